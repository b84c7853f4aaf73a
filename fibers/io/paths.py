"""Paths a user gives: refused cleanly when no file system could hold them.

``pathlib`` answers "not found" for a NUL byte or a symbolic-link loop and raises from
``resolve``; a user deserves to be told which of the two it is.
"""

from __future__ import annotations

import errno
import os
from pathlib import Path

from fibers.errors import InputError

NAME_MAX = 255  # bytes per path component on the usual file systems (ext4, xfs, APFS, NTFS)


def checked_path(path: str | os.PathLike, what: str) -> Path:
    """``path`` as a Path, after refusing a NUL byte, a symbolic-link loop or an over-long name.

    Parameters
    ----------
    path : str or path-like
    what : str
        What the path is for, in messages ("the case file", "--out").

    Raises
    ------
    InputError
    """
    text = os.fspath(path)
    if "\x00" in str(text):
        raise InputError(f"{what}: the path contains a NUL byte, which no file name can hold; check how it was typed")
    path = Path(text)
    for part in path.parts:
        if len(os.fsencode(part)) > NAME_MAX:
            raise InputError(f"{what}: the name '{part[:40]}...' is {len(os.fsencode(part))} bytes long, "
                             f"more than the {NAME_MAX} a file system allows; choose a shorter name")
    try:
        path.resolve(strict=False)
        os.stat(path)
    except RuntimeError:  # Python 3.11 reports a loop this way from resolve()
        raise InputError(f"{what}: {path} is a symbolic link that points back to itself (a loop); "
                         f"fix or remove the link") from None
    except OSError as err:
        if err.errno == errno.ELOOP:
            raise InputError(f"{what}: {path} is a symbolic link that points back to itself (a loop); "
                             f"fix or remove the link") from None
    return path
