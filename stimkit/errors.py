"""One exception family for stimkit.

Every error the library raises on purpose derives from :class:`StimkitError`. The CLI turns it
into one line on stderr and the exit code carried by the class:

- :class:`InputError` (exit 2): bad input or usage -- a missing or malformed file, an option out
  of range. The message names the file and says what is wrong and what to do.
- :class:`WorkFailed` (exit 1): the inputs were valid but the work could not be done honestly --
  an alignment refused as a wrong piece, a sync mark not found.
"""

from __future__ import annotations

from pathlib import Path

import errno

__all__ = ["StimkitError", "InputError", "WorkFailed", "from_os_error"]


class StimkitError(Exception):
    """Base class; ``exit_code`` is what the CLI returns."""

    exit_code: int = 1

    def __init__(self, message: str, *, path: str | Path | None = None):
        self.path = None if path is None else Path(path)
        text = " ".join(str(message).split())  # always one line
        if self.path is not None:
            text = f"{self.path}: {text}"
        super().__init__(text)


class InputError(StimkitError):
    """Bad input or usage (exit code 2)."""

    exit_code = 2


class WorkFailed(StimkitError):
    """Valid input, but the work failed or was refused (exit code 1)."""

    exit_code = 1


def from_os_error(exc: OSError, *, path: str | Path | None = None, doing: str = "") -> StimkitError:
    """A one-line stimkit error for an operating-system error (disk full, name too long, ...).

    ``doing`` says what was going on ("writing the outputs"); ``path`` defaults to the file the
    error names. Disk full and other failures of the machine are :class:`WorkFailed` (exit 1);
    a name too long, a missing file or a refused permission are :class:`InputError` (exit 2),
    since the user can fix them by choosing another path.
    """
    where = path if path is not None else (exc.filename if exc.filename else None)
    what = f" while {doing}" if doing else ""
    code = exc.errno
    if code in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
        return WorkFailed(f"no space left on the device{what}; free some space (or choose another "
                          f"folder) and rerun", path=where)
    if code == errno.ENAMETOOLONG:
        return InputError(f"file name too long{what}; use a shorter name or folder (most file "
                          f"systems allow 255 bytes per name)", path=where)
    if code in (errno.EACCES, errno.EPERM, errno.EROFS):
        return InputError(f"permission denied{what}; choose a folder you can write to, or fix the "
                          f"file's permissions", path=where)
    if code in (errno.ENOENT, errno.ENOTDIR):
        return InputError(f"no such file or folder{what}; check the path", path=where)
    if code == errno.EISDIR:
        return InputError(f"a folder is where a file is expected{what}; move it or choose another "
                          f"path", path=where)
    reason = exc.strerror or type(exc).__name__
    return WorkFailed(f"{reason}{what}", path=where)


#: Stop signals (SIGINT, SIGTERM, SIGHUP) received while a command runs, in order. The command
#: line's handlers record each one here before raising, so that an interrupt swallowed on its
#: way up (Python ignores exceptions raised inside finalizers and some callbacks) still stops
#: the work before anything is written: :func:`raise_if_stopped` is called before every commit.
STOP_SIGNALS: list[int] = []


def raise_if_stopped() -> None:
    """Raise ``KeyboardInterrupt`` if a stop signal was received and not acted on."""
    if STOP_SIGNALS:
        raise KeyboardInterrupt(f"stop signal {STOP_SIGNALS[0]} received earlier")
