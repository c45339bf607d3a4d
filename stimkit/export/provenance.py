"""Provenance of a run: what went in (file hashes), with what settings and software, what was warned.

Conventions
-----------
- Input files are identified by their SHA-256 (FIPS 180-4), computed by streaming 1 MiB blocks,
  and their size in bytes; paths are recorded as given.
- Rerun determinism: the provenance holds no wall-clock time, host name or user name. Library
  versions come from the installed distributions (``importlib.metadata``), so the same
  environment and inputs give the same bytes. Run timings are the only varying part: they are
  kept under the separate key ``"timings_s"`` (rounded to 0.01 s) and :func:`write_provenance`
  writes them only when asked (``with_timings=True``); by default the file is byte-identical
  across reruns.

References
----------
NIST FIPS 180-4 (2015), Secure Hash Standard (SHA-256).
"""

from __future__ import annotations

import hashlib
import platform
from importlib import metadata
from pathlib import Path

from ..errors import InputError
from .tables import OutputSet

__all__ = ["sha256_file", "library_versions", "build_provenance", "write_provenance", "KEY_LIBRARIES"]

#: Distributions whose versions are recorded (those that shape the numbers stimkit writes).
KEY_LIBRARIES = ("numpy", "scipy", "pandas", "librosa", "music21", "soundfile", "numba",
                 "matplotlib")

_BLOCK = 1 << 20


def sha256_file(path: str | Path) -> str:
    """Hex SHA-256 of a file, read in 1 MiB blocks (constant memory).

    Raises :class:`~stimkit.errors.InputError` when the file cannot be read.
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(_BLOCK), b""):
                h.update(block)
    except OSError as exc:
        raise InputError(f"cannot read file for hashing ({exc.strerror}); check the path",
                         path=path) from None
    return h.hexdigest()


def library_versions(names=KEY_LIBRARIES) -> dict[str, str | None]:
    """Installed version of each distribution (``None`` when not installed)."""
    out = {}
    for n in names:
        try:
            out[n] = metadata.version(n)
        except metadata.PackageNotFoundError:
            out[n] = None
    return out


def build_provenance(
    *,
    command: list[str],
    inputs: dict[str, Path],
    settings: dict,
    warnings: list[str],
    timings: dict[str, float] | None = None,
    show_path=str,
) -> dict:
    """The provenance record of one run.

    Parameters
    ----------
    command : list of str
        The command line (or an equivalent description of the call).
    inputs : dict
        Role (e.g. ``"score:first-piece"``, ``"audio"``) -> file path; each is hashed.
    settings : dict
        Effective settings (JSON-serializable).
    warnings : list of str
        Warnings raised during the run, in the order they occurred.
    timings : dict, optional
        Step -> seconds; kept under ``"timings_s"`` (rounded to 0.01 s), see module notes.
    show_path : callable, optional
        How an input's path is written (default: as given); e.g. relative to a study's folder.

    Returns
    -------
    dict
        Keys ``software``, ``command``, ``inputs`` (role -> path, sha256, bytes; roles sorted),
        ``settings``, ``warnings`` and, when given, ``timings_s``.
    """
    from .. import __version__

    ins = {}
    for role in sorted(inputs):
        p = Path(inputs[role])
        try:
            size = p.stat().st_size
        except OSError as exc:
            raise InputError(f"input file not found ({exc.strerror})", path=p) from None
        ins[str(role)] = {"path": show_path(inputs[role]), "sha256": sha256_file(p), "bytes": int(size)}
    data = {
        "software": {
            "stimkit": __version__,
            "python": platform.python_version(),
            "libraries": library_versions(),
        },
        "command": [str(c) for c in command],
        "inputs": ins,
        "settings": settings,
        "warnings": [str(w) for w in warnings],
    }
    if timings is not None:
        data["timings_s"] = {str(k): round(float(v), 2) for k, v in timings.items()}
    return data


def write_provenance(outs: OutputSet, data: dict, *, name: str = "provenance.json",
                     with_timings: bool = False) -> Path:
    """Stage the provenance file; ``timings_s`` is dropped unless ``with_timings``."""
    if not with_timings:
        data = {k: v for k, v in data.items() if k != "timings_s"}
    return outs.write_json(name, data)
