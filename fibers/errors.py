"""The one error type for problems the user can fix."""


class InputError(ValueError):
    """Bad input the user can correct.

    The message is one line: what is wrong, where (file, line, slice), what to do. The command
    line prints it as ``error: <message>`` and exits with status 2.
    """
