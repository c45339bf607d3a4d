"""Loaders for the hand-off files, for analysis scripts and notebooks.

What it reads
-------------
- :func:`read_events` -- ``<base>_events.tsv`` (BIDS events, with header) into a DataFrame with
  typed columns (``onset``, ``duration``, ... as float, ``measure`` as a nullable integer);
- :func:`read_stim` -- ``<base>_stim.tsv.gz`` (BIDS continuous recording, **no header**) with its
  ``_stim.json`` sidecar into a DataFrame indexed by ``onset`` (seconds on the recorder clock,
  ``StartTime + k / SamplingFrequency``), one column per entry of ``Columns``;
- :func:`read_beats` -- ``<base>_beats.tsv`` (every bar and beat with its time).

Conventions
-----------
- ``n/a`` (the BIDS missing value) becomes a missing value; no other text is read as missing,
  so a label such as ``NA`` or ``null`` stays text.
- The JSON sidecar beside a table, when present, is kept in ``df.attrs["sidecar"]`` and the
  units of its columns in ``df.attrs["units"]`` (column -> unit text), so plots can label axes.
- Any of the pair can be named: the table or its ``.json`` sidecar.
- Problems raise :class:`stimkit.errors.InputError` naming the file.

References
----------
BIDS specification 1.11: "Events" (``*_events.tsv``) and "Continuous recordings"
(``*_stim.tsv.gz`` without header; ``SamplingFrequency``, ``StartTime``, ``Columns``).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = ["read_events", "read_stim", "read_beats"]

_FLOAT_COLUMNS = ("onset", "duration", "beat", "score_qn", "nominal", "recording", "confidence")
_INT_COLUMNS = ("measure", "pass")


def _pair(path, ext: str) -> tuple[Path, Path]:
    """(table, sidecar) paths from either of them; ``ext`` is the table's extension."""
    p = Path(path)
    name = p.name
    if name.endswith(".json"):
        return p.with_name(name[: -len(".json")] + ext), p
    if name.endswith(ext):
        return p, p.with_name(name[: -len(ext)] + ".json")
    raise InputError(f"expected a {ext} table or its .json sidecar", path=p)


def _sidecar(path: Path, *, required: bool) -> dict:
    if not path.is_file():
        if required:
            raise InputError("sidecar not found; the continuous file has no header and needs its "
                             ".json beside it", path=path)
        return {}
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"cannot read the JSON sidecar ({exc})", path=path) from None


def _units(sidecar: dict, columns) -> dict[str, str]:
    return {c: str(sidecar[c]["Units"]) for c in columns
            if isinstance(sidecar.get(c), dict) and "Units" in sidecar[c]}


def _read_tsv(path: Path, **kw) -> pd.DataFrame:
    if not path.is_file():
        raise InputError("file not found; check the path", path=path)
    try:
        return pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False, **kw)
    except (OSError, UnicodeDecodeError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the table ({' '.join(str(exc).split())})", path=path) from None


def _typed(df: pd.DataFrame) -> pd.DataFrame:
    for c in _FLOAT_COLUMNS:
        if c in df.columns:
            df[c] = pd.to_numeric(df[c], errors="coerce").astype(np.float64)
    for c in _INT_COLUMNS:
        if c in df.columns:
            v = pd.to_numeric(df[c], errors="coerce")
            whole = v.dropna()
            df[c] = v.astype("Int64") if np.all(whole == np.round(whole)) else v
    for c in ("is_downbeat",):
        if c in df.columns:
            df[c] = df[c].map({"true": True, "false": False, True: True, False: False}).astype("boolean")
    return df


def _read_headed(path, what: str) -> pd.DataFrame:
    """A headed hand-off table (events, beats), typed, with its sidecar (if any) in ``attrs``."""
    tsv, side = _pair(path, ".tsv")
    df = _typed(_read_tsv(tsv, dtype=str))
    if "onset" not in df.columns:
        raise InputError(f"not {what}: no 'onset' column", path=tsv)
    sc = _sidecar(side, required=False)
    df.attrs["sidecar"] = sc
    df.attrs["units"] = _units(sc, df.columns)
    return df


def read_events(path) -> pd.DataFrame:
    """The event table of a run (``<base>_events.tsv``), typed, with its sidecar in ``attrs``.

    Examples
    --------
    >>> ev = read_events("out/sub-01_task-music_events.tsv")          # doctest: +SKIP
    >>> ev[ev.trial_type == "dynamic"][["onset", "label", "measure"]]  # doctest: +SKIP
    """
    return _read_headed(path, "an events table")


def read_stim(path) -> pd.DataFrame:
    """The continuous features (``<base>_stim.tsv.gz`` + ``.json``) indexed by ``onset``.

    The index is ``StartTime + k / SamplingFrequency`` (seconds on the recorder clock, each row
    at the centre of its analysis window); columns are named from the sidecar's ``Columns``;
    ``attrs["units"]`` holds their units.

    Examples
    --------
    >>> stim = read_stim("out/sub-01_task-music_stim.tsv.gz")   # doctest: +SKIP
    >>> stim["short_term_lufs"].plot(ylabel=stim.attrs["units"]["short_term_lufs"])  # doctest: +SKIP
    """
    data, side = _pair(path, ".tsv.gz")
    sc = _sidecar(side, required=True)
    try:
        rate = float(sc["SamplingFrequency"])
        start = float(sc.get("StartTime", 0.0))
        cols = [str(c) for c in sc["Columns"]]
    except (KeyError, TypeError, ValueError):
        raise InputError("sidecar lacks SamplingFrequency or Columns (BIDS continuous recording)",
                         path=side) from None
    if not np.isfinite(rate) or rate <= 0:
        raise InputError(f"SamplingFrequency must be above 0, got {rate}", path=side)
    df = _read_tsv(data, header=None, dtype=np.float64)
    if df.shape[1] != len(cols):
        raise InputError(f"{df.shape[1]} columns in the file but {len(cols)} named in its sidecar",
                         path=data)
    df.columns = cols
    df.index = pd.Index(start + np.arange(len(df)) / rate, name="onset")
    df.attrs["sidecar"] = sc
    df.attrs["units"] = _units(sc, cols)
    return df


def read_beats(path) -> pd.DataFrame:
    """The beat grid (``<base>_beats.tsv``): one row per beat with ``onset``, ``piece``,
    ``measure``, ``pass``, ``beat``, ``is_downbeat`` (boolean), ``score_qn``, ``recording``."""
    return _read_headed(path, "a beat table")
