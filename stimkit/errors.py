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

__all__ = ["StimkitError", "InputError", "WorkFailed"]


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
