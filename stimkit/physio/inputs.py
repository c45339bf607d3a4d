"""Reading an annotate output for relate, and running relate over several physiological files.

What it does
------------
- :func:`read_events` -- the ``_events.tsv`` through :func:`stimkit.io.read_events`, checked
  for ``onset``, ``duration``, ``trial_type`` and at least one ``piece`` row.
- :func:`read_stim` -- the continuous ``_stim.tsv.gz`` + ``_stim.json`` through
  :func:`stimkit.io.read_stim` (column names from the sidecar, index ``onset``).
- :func:`find_handoff` -- the events and stim files inside an annotate output folder.
- :func:`relate_files` -- every :class:`PhysioSpec` read and checked first (bad input stops the
  run before any work), then :func:`stimkit.physio.relate.relate` per series with its own child
  seed, then all outputs written together (:func:`stimkit.physio.outputs.write_relate`).
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..errors import InputError

__all__ = ["PhysioSpec", "RelateRun", "read_events", "read_stim", "find_handoff", "relate_files",
           "participant_label", "read_series", "settings_from_options"]


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
    """The annotate event table (:func:`stimkit.io.read_events`), checked for what relate needs:
    ``onset``, ``duration``, ``trial_type`` and at least one ``piece`` row."""
    from ..io import read_events as _read

    path = Path(path)
    ev = _read(path)
    for c in ("onset", "duration", "trial_type"):
        if c not in ev.columns:
            raise InputError(f"the events table has no '{c}' column (is it a BIDS _events.tsv?)", path=path)
    if not (ev["trial_type"].astype(str) == "piece").any():
        raise InputError("the events table has no 'piece' rows; relate needs the pieces to know when "
                         "music was playing", path=path)
    return ev


def read_stim(path) -> pd.DataFrame:
    """The continuous features indexed by ``onset`` (:func:`stimkit.io.read_stim`)."""
    from ..io import read_stim as _read

    return _read(path)


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


def settings_from_options(opts: dict, base=None):
    """RelateSettings from a session file's ``[relate]`` table (``surrogates``,
    ``pseudo_boundaries``, ``window_beats``, ``window_s``, ``guard_s``, ``jobs``; ``seed`` is
    passed separately)."""
    from dataclasses import replace

    from .relate import RelateSettings

    s = base or RelateSettings()
    kw = {}
    if "surrogates" in opts:
        kw.update(n_surrogates=int(opts["surrogates"]), n_share_null=int(opts["surrogates"]))
    if "pseudo_boundaries" in opts:
        kw["n_pseudo"] = int(opts["pseudo_boundaries"])
    if "window_beats" in opts:
        kw["window_beats"] = tuple(int(v) for v in opts["window_beats"])
    if "window_s" in opts:
        kw["window_s"] = tuple(float(v) for v in opts["window_s"])
    if "guard_s" in opts:
        kw["guard_s"] = float(opts["guard_s"])
    if "jobs" in opts:
        kw["n_jobs"] = int(opts["jobs"])
    return replace(s, **kw)


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
    inputs = {"events": Path(events_path)}
    if stim_path is not None:
        inputs["stim"] = Path(stim_path)
    for label, spec in zip(labels, specs):
        inputs[f"physio:{label}:{Path(spec.file).name}"] = Path(spec.file)
        side = Path(spec.file).with_name(Path(spec.file).name.replace(".tsv.gz", ".json"))
        if side != Path(spec.file) and side.is_file():
            inputs[f"physio_sidecar:{label}:{side.name}"] = side
    # before the work: the folder can be written (nothing is made yet) and no input would be replaced
    check_output_dir(out_dir, create=False)
    for src in inputs.values():
        if _relate_output_name(src.name) and os.path.abspath(src.parent) == os.path.abspath(out_dir):
            raise InputError("this input has the name of an output of relate and would be overwritten; "
                             "choose another output folder (-o) or move the file", path=src)
    kids = root_seed(seed).spawn(len(specs))
    results, warnings = [], []
    for spec, label, s, kid in zip(specs, labels, series, kids):
        r = relate(events, features, s, settings=settings, seed=kid, participant=label, executor=executor,
                   progress=progress)
        results.append(r)
        warnings.extend(r.warnings)
    out_dir = Path(out_dir)
    with OutputSet(out_dir, inputs=inputs.values()) as outs:  # refuses any target that is an input
        written = write_relate(outs, results, inputs=inputs, command=command)
    return RelateRun(results=results, written=[Path(w) for w in written], warnings=warnings, out_dir=out_dir)


def _relate_output_name(name: str) -> bool:
    """True for a file name that :func:`relate_files` writes (its tables, sidecars, record and figures)."""
    from .outputs import TABLE_NAMES

    stems = set(TABLE_NAMES) | {"relate"}
    return (any(name in (f"{n}.tsv", f"{n}.json") for n in stems)
            or (name.endswith(".png") and name.startswith(("forest_", "coincidence_"))))
