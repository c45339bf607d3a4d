"""Reading an annotate output for relate, and running relate over several physiological files.

What it does
------------
- :func:`read_events` -- the ``_events.tsv`` (``n/a`` missing), checked for ``onset``,
  ``duration``, ``trial_type`` and at least one ``piece`` row.
- :func:`read_stim` -- the continuous ``_stim.tsv.gz`` with its ``_stim.json``: column names
  from the sidecar's ``Columns`` (never assumed), rows at ``StartTime + k / SamplingFrequency``
  on the recorder clock (the index, named ``onset``).
- :func:`find_handoff` -- the events and stim files inside an annotate output folder.
- :func:`relate_files` -- every :class:`PhysioSpec` read and checked first (bad input stops the
  run before any work), then :func:`stimkit.physio.relate.relate` per series with its own child
  seed, then all outputs written together (:func:`stimkit.physio.outputs.write_relate`).
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["PhysioSpec", "RelateRun", "read_events", "read_stim", "find_handoff", "relate_files",
           "participant_label", "read_series"]


@dataclass
class PhysioSpec:
    """One physiological file: what it holds and whose it is."""

    file: Path
    kind: str = "rr"
    column: str | None = None
    participant: str | None = None
    mode: str | None = None
    offset_s: float = 0.0


@dataclass
class RelateRun:
    """What :func:`relate_files` did: the results per series, the files written, the warnings."""

    results: list
    written: list
    warnings: list = field(default_factory=list)
    out_dir: Path | None = None


def participant_label(path: Path) -> str:
    """``sub-<label>`` from a BIDS file name, else the file name without extensions."""
    m = re.search(r"sub-([A-Za-z0-9]+)", Path(path).name)
    if m:
        return m.group(1)
    return Path(path).name.split(".")[0]


def read_events(path) -> pd.DataFrame:
    """The annotate event table (see module notes)."""
    path = Path(path)
    if not path.is_file():
        raise InputError("events file not found; give the _events.tsv written by stimkit annotate", path=path)
    try:
        ev = pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)
    except (OSError, ValueError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the events table ({' '.join(str(exc).split())[:120]})", path=path) from None
    for c in ("onset", "duration", "trial_type"):
        if c not in ev.columns:
            raise InputError(f"the events table has no '{c}' column (is it a BIDS _events.tsv?)", path=path)
    if not (ev["trial_type"].astype(str) == "piece").any():
        raise InputError("the events table has no 'piece' rows; relate needs the pieces to know when "
                         "music was playing", path=path)
    return ev


def read_stim(path) -> pd.DataFrame:
    """The continuous features indexed by ``onset`` (see module notes)."""
    path = Path(path)
    name = path.name
    side = path.with_name(name[: -len(".tsv.gz")] + ".json") if name.endswith(".tsv.gz") else path.with_suffix(".json")
    if not path.is_file():
        raise InputError("continuous features file not found", path=path)
    if not side.is_file():
        raise InputError(f"sidecar {side.name} not found beside the continuous features", path=path)
    try:
        meta = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise InputError(f"cannot read the sidecar as JSON ({exc})", path=side) from None
    for key in ("SamplingFrequency", "StartTime", "Columns"):
        if key not in meta:
            raise InputError(f"sidecar lacks the required key '{key}'", path=side)
    fs, start, cols = meta["SamplingFrequency"], meta["StartTime"], meta["Columns"]
    if not isinstance(fs, (int, float)) or not math.isfinite(fs) or fs <= 0:
        raise InputError("SamplingFrequency must be a positive number", path=side)
    try:
        df = pd.read_csv(path, sep="\t", header=None, na_values=["n/a"], keep_default_na=False)
    except (OSError, ValueError, EOFError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the continuous features ({exc})", path=path) from None
    if df.shape[1] != len(cols):
        raise InputError(f"{df.shape[1]} columns but the sidecar lists {len(cols)}", path=path)
    df.columns = [str(c) for c in cols]
    df.index = pd.Index(float(start) + np.arange(len(df)) / float(fs), name="onset")
    return df


def find_handoff(folder) -> tuple[Path, Path | None]:
    """(events, stim or None) inside an annotate output folder."""
    folder = Path(folder)
    ev = sorted(folder.glob("*_events.tsv"))
    if len(ev) != 1:
        raise InputError(f"expected one *_events.tsv in the folder, found {len(ev)}; give the file itself",
                         path=folder)
    base = ev[0].name[: -len("_events.tsv")]
    stim = folder / f"{base}_stim.tsv.gz"
    return ev[0], stim if stim.is_file() else None


def read_series(spec: PhysioSpec):
    """Read one spec into a BeatSeries (offset applied)."""
    from .read import read_physio

    return read_physio(spec.file, kind=spec.kind, column=spec.column, mode=spec.mode, offset_s=spec.offset_s)


def relate_files(events_path, specs: list[PhysioSpec], *, out_dir, stim_path=None, settings=None, seed=0,
                 command=None, progress=None, executor=None) -> RelateRun:
    """Read, analyse and write (see module notes); nothing is written when anything fails."""
    from ..export.tables import OutputSet, check_output_dir
    from .outputs import write_relate
    from .relate import RelateSettings, relate, root_seed

    settings = settings or RelateSettings()
    events = read_events(events_path)
    features = read_stim(stim_path) if stim_path is not None else None
    if settings.music_source == "detect" and features is None:
        raise InputError("music change points by 'detect' need the continuous features (--stim)")
    if not specs:
        raise InputError("no physiological file given")
    labels = []
    series = []
    for spec in specs:
        s = read_series(spec)
        labels.append(spec.participant or participant_label(spec.file))
        series.append(s)
    keys = [(p, f"{s.kind}:{s.column}") for p, s in zip(labels, series)]
    if len(set(keys)) != len(keys):
        raise InputError("two physiological files have the same participant and series; give each its "
                         "own participant label")
    out_dir = check_output_dir(out_dir)
    kids = root_seed(seed).spawn(len(specs))
    results, warnings = [], []
    for spec, label, s, kid in zip(specs, labels, series, kids):
        r = relate(events, features, s, settings=settings, seed=kid, participant=label, executor=executor,
                   progress=progress)
        results.append(r)
        warnings.extend(r.warnings)
    inputs = {"events": Path(events_path)}
    if stim_path is not None:
        inputs["stim"] = Path(stim_path)
    for label, spec in zip(labels, specs):
        inputs[f"physio:{label}:{Path(spec.file).name}"] = Path(spec.file)
        side = Path(spec.file).with_name(Path(spec.file).name.replace(".tsv.gz", ".json"))
        if side != Path(spec.file) and side.is_file():
            inputs[f"physio_sidecar:{label}:{side.name}"] = side
    with OutputSet(out_dir) as outs:
        written = write_relate(outs, results, inputs=inputs, out_dir=out_dir, command=command)
    return RelateRun(results=results, written=[Path(w) for w in written], warnings=warnings, out_dir=out_dir)
