"""The output folder of a build: written beside, moved into place, never losing a user's file.

A build writes into a temporary folder beside ``--out`` and renames it into place only when
every file is written. Around that:

- **Ownership.** The manifest lists every file the build wrote (``files``, paths relative to
  the folder). An existing ``--out`` is replaced only when every file in it is listed there;
  otherwise the build is refused before any work, naming up to three foreign files, unless
  ``force`` is given. The page and figures that ``fibers report DIR`` re-draws later
  (``report/index.html``, ``report/*.png``) count as ours too. A folder that holds one of the build's own inputs is never replaced, not
  even with ``force``: the inputs would be deleted by the very build that reads them, and keeping
  them while replacing everything else would mix a user's folder with ours.
- **One build at a time.** A lock file beside ``--out`` (``flock``, released by the kernel
  when the process ends, even on SIGKILL) makes a second build into the same folder refuse at
  once instead of silently losing one of the two results.
- **No stale folders.** Temporary names are short (a prefix of the name, a hash and the pid), so
  a legal 250-byte ``--out`` still fits; they are removed on any error or signal, and a later
  build into the same place removes what a killed build (SIGKILL) left, once its pid is dead.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import signal
from contextlib import contextmanager
from pathlib import Path

from fibers.errors import InputError
from fibers.io.paths import checked_path

MANIFEST = "manifest.json"
SHOWN = 3  # foreign files named in a refusal
_BLOCKED = {signal.SIGINT, signal.SIGTERM, signal.SIGHUP}


def resolve_out(out) -> Path:
    """``--out`` as an absolute path without ``.`` or ``..`` (so ``--out .`` has a name)."""
    out = checked_path(out, "--out")
    out = Path(os.path.abspath(out))
    if out.parent == out:
        raise InputError(f"--out {out}: the root folder cannot be an output folder; choose a folder inside it")
    return out


def check_parent_writable(out: Path) -> None:
    """Refuse, before computing, when the folder beside ``out`` cannot be created or written."""
    parent = out.parent
    while not parent.exists():
        if parent.is_symlink():  # a dangling link: mkdir would fail later
            raise InputError(f"--out {out}: {parent} is a broken symbolic link; choose another --out")
        parent = parent.parent
    if not parent.is_dir():
        raise InputError(f"--out {out}: {parent} is a file, not a folder; choose another --out")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"--out {out}: no permission to write in {parent}; choose another --out")


def files_in(folder: Path) -> list[str]:
    """Every file (and symbolic link) below ``folder``, relative POSIX paths, sorted."""
    found = []
    for root, dirs, names in os.walk(folder):
        rel = Path(root).relative_to(folder)
        # a link to a folder is listed as a file: walking into it could leave the folder
        links = [d for d in dirs if (Path(root) / d).is_symlink()]
        dirs[:] = [d for d in dirs if d not in links]
        found += [(rel / n).as_posix() for n in names + links]
    return sorted(found)


def listed_files(folder: Path) -> set[str] | None:
    """The files a fibers manifest in ``folder`` says the build wrote; None when it has none."""
    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(manifest, dict) or manifest.get("tool") != "fibers":
        return None
    files = manifest.get("files")
    if not isinstance(files, list) or not all(isinstance(f, str) for f in files):
        return None
    return set(files) | {MANIFEST}


def check_out(out: Path, *, inputs=(), force: bool = False) -> None:
    """Refuse, before any work, an ``out`` whose replacement would lose a file.

    Parameters
    ----------
    out : Path
        Absolute output folder (see `resolve_out`).
    inputs : iterable of Path
        The build's input files; a folder holding one is never replaced.
    force : bool
        Replace a folder that holds files this tool did not write.

    Raises
    ------
    InputError
    """
    if out.is_symlink():
        raise InputError(f"--out {out} is a symbolic link; give the folder it points to, or another --out")
    if not out.exists():
        return
    if not out.is_dir():
        raise InputError(f"--out {out} is a file, not a folder; choose another --out")
    inside = [p for p in inputs if _is_within(Path(p), out)]
    if inside:
        rel = Path(os.path.abspath(inside[0])).relative_to(out).as_posix()
        raise InputError(f"--out {out} holds this build's own input {rel}; it is never replaced (not even with "
                         f"--force): choose another --out, or move the inputs out of it")
    present = files_in(out)
    if not present:
        return
    listed = listed_files(out)
    foreign = [f for f in present if listed is None or not (f in listed or _redrawn_report(f))]
    if foreign and not force:
        names = ", ".join(foreign[:SHOWN]) + (f" and {len(foreign) - SHOWN} more" if len(foreign) > SHOWN else "")
        what = ("is not a fibers output folder" if listed is None
                else "holds files this tool did not write")
        raise InputError(f"--out {out} {what} ({names}); nothing was changed: choose another --out, move those "
                         f"files away, or give --force to replace the folder and delete them")


def _redrawn_report(rel: str) -> bool:
    """A file ``fibers report DIR`` writes after the build (its page and figures)."""
    parts = rel.split("/")
    return len(parts) == 2 and parts[0] == "report" and (parts[1] == "index.html" or parts[1].endswith(".png"))


def _is_within(path: Path, folder: Path) -> bool:
    try:
        real = Path(os.path.realpath(path))
        return real == Path(os.path.realpath(folder)) or Path(os.path.realpath(folder)) in real.parents
    except (OSError, ValueError):
        return False


def _stem(out: Path) -> str:
    """Short, unique prefix of every name this build puts beside ``out``."""
    digest = hashlib.sha1(os.fsencode(out.name)).hexdigest()[:8]
    return f".{out.name[:20]}.fibers-{digest}"


def lock_path(out: Path) -> Path:
    return out.parent / f"{_stem(out)}.lock"


def partial_path(out: Path) -> Path:
    return out.parent / f"{_stem(out)}-{os.getpid()}.partial"


@contextmanager
def locked(out: Path):
    """Hold the lock beside ``out`` for the duration; refuse at once when another build holds it."""
    import fcntl

    out.parent.mkdir(parents=True, exist_ok=True)
    path = lock_path(out)
    while True:
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as err:
            raise InputError(f"--out {out}: cannot create the lock file beside it ({err.strerror}); "
                             f"choose another --out") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            os.close(fd)
            if err.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise InputError(f"--out {out}: another fibers build is writing this folder right now ({_holder(path)}); "
                                 f"wait for it to finish or choose another --out") from None
            raise
        try:  # the holder before us may have removed the file: then lock the new one
            if os.stat(path).st_ino == os.fstat(fd).st_ino:
                break
        except FileNotFoundError:
            pass
        os.close(fd)
    try:
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        remove_stale(out)
        yield path
    finally:
        try:
            os.unlink(path)
        except OSError:
            pass
        os.close(fd)


def _holder(path: Path) -> str:
    try:
        pid = int(path.read_text().strip() or 0)
    except (OSError, ValueError):
        return "lock held"
    return f"process {pid}" if pid else "lock held"


def remove_stale(out: Path) -> list[Path]:
    """Remove what killed builds into ``out`` left beside it (their pid is dead).

    Called while holding the lock, so no live build of ``out`` can own them; the pid check
    keeps us from touching anything of a live process should two names ever collide. The
    names of older fibers versions (``.<name>.partial-*``, ``.<name>.old-*``) go too.
    """
    removed = []
    candidates = list(out.parent.glob(f"{_glob_escape(_stem(out))}-*.partial"))
    candidates += list(out.parent.glob(f"{_glob_escape(_stem(out))}-*.old"))
    for path in candidates:
        pid = path.name.rsplit("-", 1)[-1].split(".")[0]
        if pid.isdigit() and not _alive(int(pid)):
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    for pattern in (f".{_glob_escape(out.name)}.partial-*", f".{_glob_escape(out.name)}.old-*"):
        for path in out.parent.glob(pattern):
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed


def _glob_escape(text: str) -> str:
    import glob

    return glob.escape(text)


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return False  # our own earlier, failed attempt in this process
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OverflowError:
        return False
    return True


@contextmanager
def signals_blocked():
    """Defer SIGINT, SIGTERM and SIGHUP: a rename pair or a clean-up must not be cut in half.

    A signal that arrives meanwhile stays pending and is delivered when the block ends.
    """
    try:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, _BLOCKED)
    except (ValueError, OSError, AttributeError):  # not the main thread, or no such call
        yield
        return
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


def rearm_signals() -> None:
    """Re-install Python's handlers of SIGINT, SIGTERM and SIGHUP at the C level.

    ``gmsh.initialize`` resets SIGTERM and SIGHUP to their default action (kill at once) behind
    Python's back, so after meshing those signals would skip every clean-up; setting the
    handlers Python still records puts them back.
    """
    try:
        for sig in _BLOCKED:
            signal.signal(sig, signal.getsignal(sig))
    except (ValueError, TypeError):  # not the main thread, or a handler set outside Python
        pass


def remove(tmp: Path) -> None:
    with signals_blocked():
        shutil.rmtree(tmp, ignore_errors=True)


def replace(tmp: Path, out: Path) -> None:
    """Move the finished ``tmp`` into place as ``out``, the older build removed only at the end."""
    old = None
    with signals_blocked():
        if out.exists():
            old = out.parent / f"{_stem(out)}-{os.getpid()}.old"
            shutil.rmtree(old, ignore_errors=True)
            out.rename(old)
        tmp.rename(out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


@contextmanager
def guarded(out, *, inputs=(), force: bool = False):
    """Check ``out`` before any work (see `check_out`) and hold its lock; yields ``out`` resolved."""
    out = resolve_out(out)
    check_parent_writable(out)
    check_out(out, inputs=inputs, force=force)
    with locked(out):
        check_out(out, inputs=inputs, force=force)  # again: it may have changed while we waited
        yield out


@contextmanager
def partial(out: Path, *, inputs=(), force: bool = False):
    """Yield a temporary folder beside ``out`` (held by `guarded`) and move it into place.

    The move happens when the block ends without error, after a last check that nobody added a
    file to ``out`` meanwhile; on any error or signal the temporary folder is removed.
    """
    tmp = partial_path(out)
    try:
        try:
            tmp.mkdir(parents=True)
        except OSError as err:
            raise InputError(f"cannot create the output folder beside {out} ({err.strerror}); "
                             "choose another --out") from None
        yield tmp
        check_out(out, inputs=inputs, force=force)  # a user may have added a file meanwhile
        replace(tmp, out)
    except BaseException:
        remove(tmp)
        raise


@contextmanager
def staged(out, *, inputs=(), force: bool = False):
    """Write a whole output folder (``fibers strain``, ``pools``, ``voxelize``) by the build's rules.

    `guarded` and `partial` in one: checks ``out``, holds the lock, yields the temporary folder
    to write into. The writer lists its files in its manifest with `listing`.
    """
    with guarded(out, inputs=inputs, force=force) as out:
        with partial(out, inputs=inputs, force=force) as tmp:
            yield tmp


def listing(tmp: Path) -> list[str]:
    """The manifest's ``files``: every file in the folder being written, and the manifest."""
    return sorted(set(files_in(tmp)) | {MANIFEST})
