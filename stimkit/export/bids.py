"""BIDS-style hand-off files (BIDS specification 1.11).

- Continuous stimulus features: ``<base>_stim.tsv.gz`` (gzip, tab-separated, **no header**) and
  ``<base>_stim.json`` with the required ``SamplingFrequency``, ``StartTime`` (seconds of the first
  row relative to the first sample of the data it goes with) and ``Columns``, plus per-column
  ``Units`` / ``Description`` and any extra keys.
- Event tables: ``<base>_events.tsv`` (``onset``, ``duration`` first, ``n/a`` for missing) and
  ``<base>_events.json`` (see :func:`write_events`, added with the annotate chain).

Conventions: every frame's time is its window centre; a continuous file's rows are at
``StartTime + k / SamplingFrequency``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .tables import OutputSet

__all__ = ["bids_name", "write_stim"]


def bids_name(*, subject=None, session=None, task=None, run=None, fallback: str = "stimkit") -> str:
    """``sub-<s>_ses-<s>_task-<t>_run-<r>`` from the entities given, else ``fallback``."""
    parts = []
    for key, val in (("sub", subject), ("ses", session), ("task", task), ("run", run)):
        if val is not None and str(val) != "":
            parts.append(f"{key}-{val}")
    return "_".join(parts) if parts else fallback


def write_stim(
    outs: OutputSet,
    base: str,
    frame: pd.DataFrame,
    *,
    sampling_hz: float,
    start_time_s: float,
    units: dict[str, str],
    descriptions: dict[str, str],
    extra: dict | None = None,
    float_format: str = "%.6g",
) -> list:
    """Stage ``<base>_stim.tsv.gz`` + ``<base>_stim.json`` for a fixed-rate feature frame.

    ``frame`` holds one column per feature, rows at ``start_time_s + k / sampling_hz``; its index
    is not written. Non-numeric columns are written as text.
    """
    cols = [str(c) for c in frame.columns]
    sidecar = {
        "SamplingFrequency": float(sampling_hz),
        "StartTime": float(start_time_s),
        "Columns": cols,
    }
    for c in cols:
        entry = {}
        if c in descriptions:
            entry["Description"] = descriptions[c]
        if c in units:
            entry["Units"] = units[c]
        if entry:
            sidecar[c] = entry
    if extra:
        for k, v in extra.items():
            if k not in sidecar:
                sidecar[k] = v
    data = frame.copy()
    data.columns = cols
    for c in cols:
        if data[c].dtype.kind == "f":
            data[c] = data[c].astype(np.float64)
    p1 = outs.write_tsv_gz(f"{base}_stim.tsv.gz", data, float_format=float_format)
    p2 = outs.write_json(f"{base}_stim.json", sidecar)
    return [p1, p2]
