"""Provenance of a run: what went in (file hashes), with what settings and software, what was warned.

Conventions
-----------
- Input files are identified by their SHA-256 (FIPS 180-4), computed by streaming 1 MiB blocks,
  and their size in bytes. Paths are written relative to a base folder -- the session file's
  folder, or the current folder for a run without one -- with ``/`` separators
  (:func:`portable_path`), and the output folder as ``.`` (the provenance file lies in it), so
  the file names no machine folder and is byte-identical wherever the same project is run.
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
import os
import platform
from importlib import metadata
from pathlib import Path

from ..errors import InputError
from .tables import OutputSet

__all__ = ["sha256_file", "library_versions", "build_provenance", "write_provenance", "KEY_LIBRARIES",
           "portable_path", "portable_command"]

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


def portable_path(path: str | Path, base_dir: str | Path) -> str:
    """``path`` relative to ``base_dir`` with ``/`` separators (``"."`` for the folder itself).

    Both are made absolute first (relative ones from the current folder). When no relative path
    exists (another drive on Windows) the file name alone is returned.
    """
    p = os.path.abspath(os.fspath(path))
    b = os.path.abspath(os.fspath(base_dir))
    try:
        rel = os.path.relpath(p, b)
    except ValueError:
        return Path(p).name
    return Path(rel).as_posix()


def portable_command(command, *, base_dir: str | Path, out_dir: str | Path | None = None) -> list[str]:
    """The command line with machine paths made portable: an argument naming the output folder
    becomes ``.``, one naming an existing file becomes :func:`portable_path`; other arguments
    are kept as typed."""
    out_abs = os.path.abspath(os.fspath(out_dir)) if out_dir is not None else None
    res = []
    for a in command:
        a = str(a)
        if a.startswith("-") or not a:
            res.append(a)
        elif out_abs is not None and os.path.abspath(a) == out_abs:
            res.append(".")
        elif os.path.isfile(a):
            res.append(portable_path(a, base_dir))
        else:
            res.append(a)
    return res


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
    base_dir: str | Path | None = None,
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
    base_dir : path-like, optional
        Input paths are written relative to it (:func:`portable_path`); as given when None.

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
        shown = str(inputs[role]) if base_dir is None else portable_path(p, base_dir)
        ins[str(role)] = {"path": shown, "sha256": sha256_file(p), "bytes": int(size)}
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
