"""BIDS-style hand-off files (BIDS specification 1.11).

- Continuous stimulus features: ``<base>_stim.tsv.gz`` (gzip, tab-separated, **no header**) and
  ``<base>_stim.json`` with the required ``SamplingFrequency``, ``StartTime`` (seconds of the first
  row relative to the first sample of the data it goes with) and ``Columns``, plus per-column
  ``Units`` / ``Description`` and any extra keys.
- Event tables: ``<base>_events.tsv`` (``onset``, ``duration`` first, ``n/a`` for missing) and
  ``<base>_events.json`` with LongName / Description / Units per column, ``Levels`` and HED tags
  per ``trial_type`` level, and a note on the clock of ``onset`` (:func:`write_events`).
- Beat grid: ``<base>_beats.tsv`` + ``.json`` (:func:`write_beats`), one row per beat.
- ``dataset_description.json`` with ``HEDVersion`` (:func:`dataset_description`).

Conventions: every frame's time is its window centre; a continuous file's rows are at
``StartTime + k / SamplingFrequency``. Event rows are sorted by onset, then kind, then label;
seconds carry 6 decimals; the same table gives the same bytes.

References
----------
Brain Imaging Data Structure specification 1.11: "Common principles -- Tabular files",
"Modality agnostic files -- Task events", "Continuous recordings" (and its machine-readable
schema, as read by ``bidsschematools``).
HED Working Group, HED specification 3 and HED standard schema 8.3.0 ("BIDS sidecars").
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import WorkFailed
from ..levels import COLUMN_INFO, EVENT_COLUMNS, HED_TAGS, TRIAL_TYPES
from .tables import OutputSet

__all__ = [
    "bids_name", "numeric_columns", "write_stim", "events_sidecar", "hed_annotation", "prepare_events",
    "merge_simultaneous", "events_for_writing", "write_events", "write_beats", "dataset_description",
    "write_dataset_description", "BEAT_COLUMNS", "BIDS_VERSION", "HED_VERSION",
]


def bids_name(*, subject=None, session=None, task=None, run=None, fallback: str = "stimkit") -> str:
    """``sub-<s>_ses-<s>_task-<t>_run-<r>`` from the entities given, else ``fallback``."""
    parts = []
    for key, val in (("sub", subject), ("ses", session), ("task", task), ("run", run)):
        if val is not None and str(val) != "":
            parts.append(f"{key}-{val}")
    return "_".join(parts) if parts else fallback


def numeric_columns(frame: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """A copy of ``frame`` with numeric columns only (booleans as 0/1) and the names left out."""
    out = frame.copy()
    dropped = []
    for c in list(out.columns):
        if out[c].dtype == bool:
            out[c] = out[c].astype(np.int64)
        elif out[c].dtype.kind not in "iuf":
            dropped.append(str(c))
            out = out.drop(columns=c)
    return out, dropped


def _has_unit(u) -> bool:
    """A unit worth writing: not missing, empty or a placeholder such as ``n/a`` (BIDS: leave
    ``Units`` out of a column that has none)."""
    return u is not None and str(u).strip().lower() not in ("", "n/a", "na", "none", "-")


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
    is not written. The continuous file is numeric only, so any numeric loader reads it: booleans
    are written as 0/1 and text columns (e.g. a key name) are left out and listed under
    ``ColumnsLeftOut`` in the sidecar (keep them in a headed table instead).
    """
    data, dropped = numeric_columns(frame)
    cols = [str(c) for c in data.columns]
    sidecar = {
        "SamplingFrequency": float(sampling_hz),
        "StartTime": float(start_time_s),
        "Columns": cols,
    }
    for c in cols:
        entry = {}
        if c in descriptions:
            entry["Description"] = descriptions[c]
        if _has_unit(units.get(c)):
            entry["Units"] = units[c]
        if entry:
            sidecar[c] = entry
    if dropped:
        sidecar["ColumnsLeftOut"] = {c: "text feature; kept out of the numeric continuous file"
                                     for c in dropped}
    if extra:
        for k, v in extra.items():
            if k not in sidecar:
                sidecar[k] = v
    data.columns = cols
    for c in cols:
        if data[c].dtype.kind == "f":
            data[c] = data[c].astype(np.float64)
    p1 = outs.write_tsv_gz(f"{base}_stim.tsv.gz", data, float_format=float_format)
    p2 = outs.write_json(f"{base}_stim.json", sidecar)
    return [p1, p2]


# ---------------------------------------------------------------------------------------------
# Event tables
# ---------------------------------------------------------------------------------------------

#: Columns holding seconds: written with 6 decimals (microseconds), the rest of the floats with
#: 6 significant digits.
SECONDS_COLUMNS = ("onset", "duration", "nominal", "recording")
_FIXED_COLUMNS = SECONDS_COLUMNS + ("score_qn",)

#: BIDS version the hand-off files follow.
BIDS_VERSION = "1.11.0"
#: HED standard schema the ``HED_TAGS`` strings are written against.
HED_VERSION = "8.3.0"


def _clock_note(synchronized: bool | None) -> dict:
    if synchronized is True:
        text = ("The onset column is on the physiological recorder's clock: recording time mapped "
                "through the sync fit (offset and drift) computed from the sync marks.")
    elif synchronized is False:
        text = ("No sync was given: onset equals recording time (seconds from the first sample of "
                "the recording file), not the physiological recorder's clock.")
    else:
        text = "The producer did not state whether onset was synchronized to the recorder clock."
    return {"Description": text, "Synchronized": synchronized}


def _check_levels(events: pd.DataFrame) -> list[str]:
    if "trial_type" not in events.columns:
        return []
    present = {str(v) for v in events["trial_type"] if not pd.isna(v)}
    unknown = sorted(present - set(TRIAL_TYPES))
    if unknown:
        raise WorkFailed(
            f"events table has trial_type level(s) {', '.join(unknown)} that are not documented in "
            "stimkit.levels.TRIAL_TYPES; add them there (with HED tags) before exporting")
    return [lvl for lvl in TRIAL_TYPES if lvl in present]


def hed_annotation(level: str) -> str:
    """The HED string of one ``trial_type`` level: its tags and ``Label/<level>`` in one group.

    HED tools assemble the rows that share an onset into one event, so two kinds with the same
    tags at the same time (a dynamic and a hairpin, say) would repeat a tag, which HED rejects
    (``TAG_EXPRESSION_REPEATED``). One parenthesized group per row, made distinct by a
    ``Label`` tag naming the level, keeps simultaneous events of different kinds valid. Two
    rows of the *same* kind at the same onset would still repeat their group: :func:`write_events`
    merges them (:func:`merge_simultaneous`).
    """
    return f"({HED_TAGS[level]}, Label/{level})"


def events_sidecar(events: pd.DataFrame, *, extra: dict | None = None,
                   synchronized: bool | None = None) -> dict:
    """The ``*_events.json`` sidecar describing every column of ``events`` (BIDS 1.11).

    Parameters
    ----------
    events : DataFrame
        The event table (columns of :data:`stimkit.levels.EVENT_COLUMNS`, possibly more).
    extra : dict, optional
        Keys added to the sidecar. A key equal to a column name whose value is a dict is merged
        into that column's description (use it to describe extra columns: ``{"value":
        {"LongName": ..., "Description": ..., "Units": ...}}``); other keys are added at the top
        level (e.g. the sync fit). A caller-given ``"OnsetClock"`` replaces the default note.
    synchronized : bool, optional
        Whether ``onset`` went through a clock sync (True) or equals recording time (False);
        written as the top-level ``OnsetClock`` note and appended to the ``onset`` description.

    Returns
    -------
    dict
        Column name -> ``{"LongName", "Description", "Units"?}``, in the table's written column
        order; ``trial_type`` also carries ``Levels`` and ``HED`` (level -> HED tag string), then
        ``OnsetClock``, then the top-level ``extra`` keys.

    Notes
    -----
    ``Levels`` lists only the levels **present** in this table (in :data:`TRIAL_TYPES` order), so
    the sidecar documents exactly the file it sits beside and a validator finds no HED annotation
    for a value that never occurs; the full vocabulary is :data:`stimkit.levels.TRIAL_TYPES`. A
    level not in that vocabulary raises :class:`~stimkit.errors.WorkFailed`: every value written
    must be documented (BIDS 1.11, "Tabular files": categorical values described in ``Levels``;
    HED annotations per categorical value go in ``"HED": {level: tags}``).

    References
    ----------
    BIDS specification 1.11, "Task events" and "Tabular files";
    HED specification 3 / standard schema 8.x, "BIDS sidecars".
    """
    extra = dict(extra or {})
    cols = _ordered_columns(events)
    side: dict = {}
    clock = extra.pop("OnsetClock", None) or _clock_note(synchronized)
    for c in cols:
        if c in COLUMN_INFO:
            long_name, desc, units = COLUMN_INFO[c]
            entry = {"LongName": long_name, "Description": desc}
            if units:
                entry["Units"] = units
        else:
            entry = {"LongName": c,
                     "Description": f"Additional column '{c}' (not described by its producer)."}
        if c == "onset" and synchronized is not None:
            entry["Description"] = entry["Description"] + " In this file: " + clock["Description"]
        if c == "trial_type":
            levels = _check_levels(events)
            entry["Levels"] = {lvl: TRIAL_TYPES[lvl] for lvl in levels}
            entry["HED"] = {lvl: hed_annotation(lvl) for lvl in levels if lvl in HED_TAGS}
        if isinstance(extra.get(c), dict):
            entry.update(extra.pop(c))
        side[c] = entry
    side["OnsetClock"] = clock
    for k, v in extra.items():
        if k not in side:
            side[k] = v
    return side


def _ordered_columns(events: pd.DataFrame) -> list[str]:
    cols = [str(c) for c in events.columns]
    known = [c for c in EVENT_COLUMNS if c in cols]
    rest = [c for c in cols if c not in EVENT_COLUMNS]
    return known + rest


def _trial_rank(values: pd.Series) -> pd.Series:
    order = {lvl: i for i, lvl in enumerate(TRIAL_TYPES)}
    return values.map(lambda v: order.get(str(v), len(order)) if not pd.isna(v) else len(order) + 1)


def prepare_events(events: pd.DataFrame) -> pd.DataFrame:
    """Validate, order the columns and sort the rows of an event table for writing.

    Columns: all of :data:`EVENT_COLUMNS` (``onset``, ``duration`` first; a column the caller did
    not give is filled with missing values, so every events file has the same leading columns),
    then extra columns in their given order. Rows: by ``onset``, then ``trial_type`` (in :data:`TRIAL_TYPES`
    order, so a ``piece`` row precedes the markings at its first note), then ``label``; ties keep
    the input order (stable sort), so equal input gives equal output.

    Raises
    ------
    WorkFailed
        If ``onset`` or ``duration`` is missing, an onset is not finite (events without a time
        must be dropped by the caller) or a duration is negative.
    """
    if not isinstance(events, pd.DataFrame):
        raise WorkFailed("events must be a pandas DataFrame")
    events = events.copy()
    events.columns = [str(c) for c in events.columns]
    if "onset" not in events.columns:
        raise WorkFailed("event table has no 'onset' column (required by BIDS)")
    if "duration" not in events.columns:
        raise WorkFailed("event table has no 'duration' column (required by BIDS)")
    onset = pd.to_numeric(events["onset"], errors="coerce").astype(np.float64)
    bad = ~np.isfinite(onset.to_numpy())
    if bad.any():
        raise WorkFailed(f"{int(bad.sum())} event(s) have no finite onset (first at row "
                         f"{int(np.flatnonzero(bad)[0])}); drop events without a time before export")
    dur = pd.to_numeric(events["duration"], errors="coerce").astype(np.float64)
    neg = dur.to_numpy() < 0
    if neg.any():
        raise WorkFailed(f"{int(neg.sum())} event(s) have a negative duration (first at row "
                         f"{int(np.flatnonzero(neg)[0])}); BIDS durations are >= 0")
    events["onset"] = onset
    events["duration"] = dur
    _check_levels(events)
    for c in EVENT_COLUMNS:
        if c not in events.columns:
            events[c] = None
    events = events[_ordered_columns(events)]
    keys = pd.DataFrame({"onset": onset.to_numpy()}, index=events.index)
    by = ["onset"]
    if "trial_type" in events.columns:
        keys["_rank"] = _trial_rank(events["trial_type"]).to_numpy()
        keys["_tt"] = events["trial_type"].map(lambda v: "" if pd.isna(v) else str(v)).to_numpy()
        by += ["_rank", "_tt"]
    if "label" in events.columns:
        keys["_label"] = events["label"].map(lambda v: "\uffff" if pd.isna(v) else str(v)).to_numpy()
        by.append("_label")
    keys["_pos"] = np.arange(len(keys))
    order = keys.sort_values(by + ["_pos"], kind="mergesort").index
    return events.loc[order].reset_index(drop=True)


def merge_simultaneous(events: pd.DataFrame) -> pd.DataFrame:
    """One row per (onset, trial_type): rows of the same kind at the same time are merged.

    HED tools assemble all rows that share an onset into one event, and the same kind twice
    there repeats its HED group (``TAG_EXPRESSION_REPEATED``), so a BIDS validator rejects the
    dataset. Rows are taken as simultaneous when their onsets agree to the 6 written decimals.
    In a merged row ``label``, ``part`` and ``source`` join the distinct values with `` + `` in
    table order (when different labels come from different parts, each label carries its part
    in brackets, ``p (Violin) + mf (Cello)``); ``dynamic_level`` is kept when the rows agree and
    is n/a otherwise; ``duration`` is the longest; ``confidence`` the lowest (the cautious value);
    every other column (``measure``, ``beat``, ...) comes from the row that starts a bar -- the
    lowest ``beat``, so "double bar" at bar 25 beat 5 and "rehearsal mark C" at bar 26 beat 1
    give bar 26 beat 1 -- or the first row when no beat is known. ``events`` must already be sorted
    (:func:`prepare_events`); the order of the remaining rows is kept.
    """
    if "trial_type" not in events.columns or len(events) < 2:
        return events
    key_on = np.round(events["onset"].to_numpy(np.float64), 6)
    key_tt = events["trial_type"].map(lambda v: "" if pd.isna(v) else str(v)).to_numpy()
    keys = list(zip(key_on.tolist(), key_tt.tolist()))
    first: dict[tuple, int] = {}
    groups: dict[int, list[int]] = {}
    for i, k in enumerate(keys):
        j = first.setdefault(k, i)
        groups.setdefault(j, []).append(i)
    if all(len(g) == 1 for g in groups.values()):
        return events
    firsts = sorted(groups)
    # the representative row of a group: the one that starts a bar (lowest beat), so an
    # end-of-bar marking (double bar, repeat end: "bar 8, beat 5") yields to the bar that
    # begins at that instant ("bar 1, beat 1" of the repeat); ties keep the first
    beat = pd.to_numeric(events["beat"], errors="coerce").to_numpy(np.float64) \
        if "beat" in events.columns else np.full(len(events), np.nan)
    beat = np.where(np.isfinite(beat), beat, np.inf)
    reps = [groups[j][int(np.argmin(beat[groups[j]]))] for j in firsts]
    out = events.iloc[reps].copy()
    out.index = firsts
    for c in ("label", "part", "source", "confidence", "dynamic_level"):
        if c in out.columns:
            out[c] = out[c].astype(object)
    for j in firsts:
        idx = groups[j]
        if len(idx) == 1:
            continue
        sub = events.iloc[idx]
        for c in ("label", "part", "source"):
            if c in sub.columns:
                vals = [str(v) for v in sub[c] if not pd.isna(v)]
                out.at[j, c] = " + ".join(dict.fromkeys(vals)) if vals else None
        if "label" in sub.columns and "part" in sub.columns:
            out.at[j, "label"] = _label_with_parts(sub["label"], sub["part"]) or out.at[j, "label"]
        if "dynamic_level" in sub.columns:
            lv = pd.to_numeric(sub["dynamic_level"], errors="coerce").to_numpy(np.float64)
            lv = np.unique(lv[np.isfinite(lv)])
            out.at[j, "dynamic_level"] = float(lv[0]) if lv.size == 1 else np.nan
        if "duration" in sub.columns:
            d = sub["duration"].to_numpy(np.float64)
            out.at[j, "duration"] = np.nanmax(d) if np.isfinite(d).any() else np.nan
        if "confidence" in sub.columns:
            cf = pd.to_numeric(sub["confidence"], errors="coerce").to_numpy(np.float64)
            out.at[j, "confidence"] = float(np.nanmin(cf)) if np.isfinite(cf).any() else np.nan
    return out.reset_index(drop=True)


def _label_with_parts(labels: pd.Series, parts: pd.Series) -> str | None:
    """``"p (Violin) + mf (Cello)"`` when different labels come from different parts, else None."""
    pairs = [(str(lab), None if pd.isna(pt) else str(pt)) for lab, pt in zip(labels, parts) if not pd.isna(lab)]
    if len({lab for lab, _ in pairs}) < 2 or len({pt for _, pt in pairs}) < 2:
        return None
    shown = [lab if pt in (None, "all") else f"{lab} ({pt})" for lab, pt in pairs]
    return " + ".join(dict.fromkeys(shown))


#: Fixed formats of columns that are not seconds: ``confidence`` always with three decimals.
_COLUMN_FORMATS = {"confidence": "%.3f"}


def _float_formats(df: pd.DataFrame) -> dict[str, str]:
    fmts = {}
    for c in df.columns:
        fmts[c] = "%.6f" if c in _FIXED_COLUMNS else _COLUMN_FORMATS.get(c, "%.6g")
    return fmts


def events_for_writing(events: pd.DataFrame, *, merge_same_kind: bool = True) -> pd.DataFrame:
    """The event table exactly as :func:`write_events` writes it (ordered, same-kind rows at one
    moment merged, whole bar and pass numbers as integers), for anything else that shows the
    events (the report) to show the same rows."""
    table = prepare_events(events)
    if merge_same_kind:
        table = merge_simultaneous(table)
    return _integral_to_int(table, ["measure", "pass", "dynamic_level"])


def _integral_to_int(df: pd.DataFrame, cols) -> pd.DataFrame:
    """Float columns that hold whole numbers (with NaN) become nullable-free object ints."""
    for c in cols:
        if c in df.columns and df[c].dtype.kind == "f":
            v = df[c].to_numpy()
            fin = np.isfinite(v)
            if np.all(v[fin] == np.round(v[fin])):
                df[c] = [int(x) if np.isfinite(x) else None for x in v]
    return df


def write_events(outs: OutputSet, base: str, events: pd.DataFrame, *, extra: dict | None = None,
                 synchronized: bool | None = None, merge_same_kind: bool = True) -> list:
    """Stage ``<base>_events.tsv`` and ``<base>_events.json``.

    The table is validated and ordered by :func:`prepare_events`; seconds (``onset``,
    ``duration``, ``nominal``, ``recording``) and ``score_qn`` are written with 6 decimals, other
    floats with 6 significant digits, whole-number ``measure`` values as integers, booleans as
    ``true``/``false``, missing values as ``n/a``. The sidecar is :func:`events_sidecar`.
    With ``merge_same_kind`` (default) rows of the same ``trial_type`` at the same onset become
    one row (:func:`merge_simultaneous`), which keeps the file valid for HED validators.

    Returns
    -------
    list of Path
        ``[tsv, json]`` (staged; they appear when the :class:`OutputSet` commits).
    """
    table = events_for_writing(events, merge_same_kind=merge_same_kind)
    sidecar = events_sidecar(table, extra=extra, synchronized=synchronized)
    p1 = outs.write_tsv(f"{base}_events.tsv", table, column_formats=_float_formats(table))
    p2 = outs.write_json(f"{base}_events.json", sidecar)
    return [p1, p2]


# ---------------------------------------------------------------------------------------------
# Beat grid
# ---------------------------------------------------------------------------------------------

BEAT_COLUMNS = ["onset", "duration", "piece", "measure", "pass", "beat", "is_downbeat",
                "score_qn", "recording"]

BEAT_INFO: dict[str, tuple[str, str, str | None]] = {
    "onset": ("Beat onset", "Time of the beat on the same clock as the events file's onset.", "s"),
    "duration": ("Beat duration", "Time to the next beat of the same piece (n/a for the last beat).", "s"),
    "piece": ("Piece", "Name of the piece the beat belongs to.", None),
    "measure": COLUMN_INFO["measure"],
    "pass": ("Pass", "Which playing of the bar this is: 1 the first time, 2 on its first repeat, "
             "and so on.", None),
    "beat": ("Beat", "Beat within the bar, counted from 1 in the bar's beat unit.", None),
    "is_downbeat": ("Downbeat", "True on the first beat of a bar, false on the others.", None),
    "score_qn": COLUMN_INFO["score_qn"],
    "recording": COLUMN_INFO["recording"],
}


def write_beats(outs: OutputSet, base: str, beats: pd.DataFrame) -> list:
    """Stage ``<base>_beats.tsv`` (with header) and ``<base>_beats.json`` describing its columns.

    ``beats`` needs ``onset``; ``duration`` is computed when absent as the time to the next beat
    of the same piece (n/a for each piece's last beat); ``is_downbeat`` is derived from
    ``beat == 1`` when absent; other missing columns are written as ``n/a``. Rows are sorted by
    ``onset`` (stable). Returns ``[tsv, json]``.
    """
    if "onset" not in beats.columns:
        raise WorkFailed("beat table has no 'onset' column")
    df = beats.copy()
    df["onset"] = pd.to_numeric(df["onset"], errors="coerce").astype(np.float64)
    bad = ~np.isfinite(df["onset"].to_numpy())
    if bad.any():
        raise WorkFailed(f"{int(bad.sum())} beat(s) have no finite onset; drop them before export")
    df = df.sort_values("onset", kind="mergesort").reset_index(drop=True)
    if "duration" not in df.columns:
        groups = df["piece"].astype(str) if "piece" in df.columns else pd.Series("", index=df.index)
        nxt = df.groupby(groups, sort=False)["onset"].shift(-1)
        df["duration"] = (nxt - df["onset"]).astype(np.float64)
    if "is_downbeat" not in df.columns and "beat" in df.columns:
        b = pd.to_numeric(df["beat"], errors="coerce")
        df["is_downbeat"] = [None if pd.isna(x) else bool(x == 1) for x in b]
    for c in BEAT_COLUMNS:
        if c not in df.columns:
            df[c] = None
    df = df[BEAT_COLUMNS]
    df = _integral_to_int(df, ["measure", "pass"])
    side = {c: {"LongName": ln, "Description": d, **({"Units": u} if u else {})}
            for c, (ln, d, u) in BEAT_INFO.items()}
    p1 = outs.write_tsv(f"{base}_beats.tsv", df, column_formats=_float_formats(df))
    p2 = outs.write_json(f"{base}_beats.json", side)
    return [p1, p2]


# ---------------------------------------------------------------------------------------------
# Dataset description
# ---------------------------------------------------------------------------------------------

def dataset_description(*, name: str, hed_version: str = HED_VERSION, authors: list[str] | None = None,
                        dataset_type: str = "raw", extra: dict | None = None) -> dict:
    """``dataset_description.json`` content: ``Name``, ``BIDSVersion``, ``HEDVersion``, ...

    BIDS requires ``HEDVersion`` in ``dataset_description.json`` whenever HED annotations are
    used (the events sidecar carries HED tags per ``trial_type`` level). ``GeneratedBy`` names
    stimkit and its version.
    """
    from .. import __version__

    desc = {
        "Name": str(name),
        "BIDSVersion": BIDS_VERSION,
        "HEDVersion": str(hed_version),
        "DatasetType": dataset_type,
    }
    if authors:
        desc["Authors"] = [str(a) for a in authors]
    desc["GeneratedBy"] = [{"Name": "stimkit", "Version": __version__}]
    for k, v in (extra or {}).items():
        desc.setdefault(k, v)
    return desc


def write_dataset_description(outs: OutputSet, **kwargs) -> object:
    """Stage ``dataset_description.json`` from :func:`dataset_description` (same keywords)."""
    return outs.write_json("dataset_description.json", dataset_description(**kwargs))
