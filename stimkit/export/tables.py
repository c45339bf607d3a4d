"""Atomic, deterministic writing of TSV, JSON and gzip files.

Conventions
-----------
- Every output of a run is written through an :class:`OutputSet`: files are first written as
  hidden temporary files in the target folder and renamed into place only when the whole run
  succeeded (``commit``). An exception -- including ``KeyboardInterrupt`` -- removes the
  temporaries, so a failed or interrupted run leaves no half-written file.
- Same data -> same bytes: fixed float format, ``n/a`` for missing values, ``\\n`` line ends,
  UTF-8, JSON with a fixed key order and indent, gzip with mtime 0 and no embedded file name.
"""

from __future__ import annotations

import gzip
import io
import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = [
    "OutputSet",
    "format_tsv",
    "to_json_text",
    "gzip_bytes",
    "check_output_dir",
    "atomic_write_bytes",
    "is_missing",
]

NA = "n/a"


def is_missing(v) -> bool:
    """True for ``None`` and for what :func:`pandas.isna` calls missing (NaN, NaT, ``pd.NA``)."""
    if v is None:
        return True
    try:
        return bool(pd.isna(v))
    except (TypeError, ValueError):
        return False


def _fmt_value(v, float_format: str) -> str:
    if v is None:
        return NA
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(float(v)):
            return NA
        s = float_format % float(v)
        return "0" + s[2:] if s.startswith("-0") and float(s) == 0 else s  # no "-0.000"
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if is_missing(v):
        return NA
    s = str(v)
    return s.replace("\t", " ").replace("\n", " ").replace("\r", " ") or NA


def format_tsv(
    df: pd.DataFrame,
    *,
    float_format: str = "%.6f",
    column_formats: dict[str, str] | None = None,
    header: bool = True,
) -> str:
    """Tab-separated text of ``df`` (index not written); missing values are ``n/a``."""
    column_formats = column_formats or {}
    lines = []
    if header:
        lines.append("\t".join(str(c) for c in df.columns))
    cols = list(df.columns)
    fmts = [column_formats.get(c, float_format) for c in cols]
    for row in df.itertuples(index=False, name=None):
        lines.append("\t".join(_fmt_value(v, f) for v, f in zip(row, fmts)))
    return "\n".join(lines) + "\n"


def _clean_json(obj, decimals: int):
    if isinstance(obj, dict):
        return {str(k): _clean_json(v, decimals) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean_json(v, decimals) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_clean_json(v, decimals) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        if not math.isfinite(f):
            return None
        r = round(f, decimals)
        return 0.0 if r == 0 else r
    if isinstance(obj, Path):
        return str(obj)
    return obj


def to_json_text(obj, *, decimals: int = 6) -> str:
    """Deterministic JSON (insertion key order, indent 2, floats rounded, NaN -> null)."""
    return json.dumps(_clean_json(obj, decimals), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def gzip_bytes(data: bytes) -> bytes:
    """gzip with mtime 0 and no file name, so equal data gives equal bytes."""
    buf = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=buf, mtime=0, compresslevel=6) as gz:
        gz.write(data)
    return buf.getvalue()


def check_output_dir(out_dir: str | Path) -> Path:
    """Create ``out_dir`` if needed and check it is writable; raise :class:`InputError` if not."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError("output path exists and is not a folder", path=out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create output folder ({exc.strerror})", path=out) from None
    # probe with a real file: os.access says yes to root even where the folder refuses files
    try:
        fd, probe = tempfile.mkstemp(prefix=".stimkit-probe.", dir=out)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise InputError(f"output folder is not writable ({exc.strerror or exc})", path=out) from None
    return out


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write one file atomically (temporary file in the same folder, then rename)."""
    with OutputSet(Path(path).parent) as outs:
        outs.write_bytes(Path(path).name, data)


class OutputSet:
    """A transaction over the files of one run.

    Use as a context manager; files written through it appear only when the block ends without
    an exception::

        with OutputSet(out_dir) as outs:
            outs.write_tsv("piece.boundaries.tsv", table)
            outs.write_json("piece.boundaries.json", meta)
    """

    def __init__(self, out_dir: str | Path):
        self.out_dir = Path(out_dir)
        self._staged: list[tuple[Path, Path]] = []
        self.committed: list[Path] = []

    # -- staging -------------------------------------------------------------------------
    def write_bytes(self, name: str, data: bytes) -> Path:
        target = self.out_dir / name
        if any(t == target for _, t in self._staged):
            raise ValueError(f"{target} staged twice in one run")
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        self._staged.append((Path(tmp), target))
        return target

    def write_text(self, name: str, text: str) -> Path:
        return self.write_bytes(name, text.encode("utf-8"))

    def write_tsv(self, name: str, df: pd.DataFrame, **fmt) -> Path:
        return self.write_text(name, format_tsv(df, **fmt))

    def write_tsv_gz(self, name: str, df: pd.DataFrame, **fmt) -> Path:
        fmt.setdefault("header", False)
        return self.write_bytes(name, gzip_bytes(format_tsv(df, **fmt).encode("utf-8")))

    def write_json(self, name: str, obj, *, decimals: int = 6) -> Path:
        return self.write_text(name, to_json_text(obj, decimals=decimals))

    # -- transaction ---------------------------------------------------------------------
    def commit(self) -> list[Path]:
        for tmp, target in self._staged:
            os.chmod(tmp, 0o644)
            os.replace(tmp, target)
            self.committed.append(target)
        self._staged.clear()
        return list(self.committed)

    def abort(self) -> None:
        for tmp, _ in self._staged:
            tmp.unlink(missing_ok=True)
        self._staged.clear()

    def __enter__(self) -> "OutputSet":
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            self.commit()
        else:
            self.abort()
        return False
