"""The event table: score boundaries, silences and sync marks placed on the recorder's clock.

What it computes
----------------
- :func:`piece_events` -- one ``piece`` row (onset at the first sounding note, duration to the
  end of the last note) and one row per score boundary. ``recording`` comes from the alignment's
  ``score_qn -> recording`` map, ``nominal`` from the score's tempo map, ``confidence`` from the
  alignment, ``onset`` from the clock fit applied to ``recording``; ``pass`` tells the playings
  of a repeated bar apart; ``dynamic_level`` is the number of a dynamic or accent mark
  (:data:`stimkit.score.markings.DYNAMIC_LEVELS`, pppp = 1 ... ffff = 10).
- :func:`silence_events`, :func:`sync_events`, :func:`change_events` -- session-level rows.
- :func:`merge_events` -- all rows in one table with :data:`stimkit.levels.EVENT_COLUMNS`,
  sorted deterministically by ``onset``, ``trial_type``, ``label``.
- :func:`beat_table` -- every bar and beat of a piece with its ``recording`` and ``onset`` time.
- :func:`with_tail` -- the alignment map with a held ending after the last note onset.

Conventions
-----------
Kinds of time as in DESIGN.md: ``score_qn`` (quarter notes as performed), ``nominal`` (seconds
from the piece's start at the notated tempo), ``recording`` (seconds from the recording's first
sample), ``onset`` (recorder clock). Durations on the recorder clock are differences of onsets.
Missing values are ``NaN`` / ``None`` (written as ``n/a``). A marking at the end of a bar (a
double or final bar line, a repeat end) keeps the bar it closes in ``measure`` and has no
``beat`` (the score gives it one past the bar's last beat, "beat 5 of a 4/4 bar", which no
player counts); its time columns say when the bar ends.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..export.tables import is_missing
from ..levels import EVENT_COLUMNS, TRIAL_TYPES

__all__ = ["with_tail", "piece_events", "repeat_events", "silence_events", "sync_events", "change_events",
           "merge_events", "beat_table", "empty_events"]


def empty_events() -> pd.DataFrame:
    """An event table with no rows and the standard columns."""
    return pd.DataFrame({c: pd.Series([], dtype=object) for c in EVENT_COLUMNS})


def _frame(rows: list[dict]) -> pd.DataFrame:
    if not rows:
        return empty_events()
    df = pd.DataFrame(rows)
    for c in EVENT_COLUMNS:
        if c not in df.columns:
            df[c] = None
    return df[EVENT_COLUMNS]


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f


def _text(v):
    if is_missing(v):
        return None
    s = str(v)
    return s if s else None


#: Quarter notes before the last note onset over which the performed / notated time ratio is
#: measured for the tail of a piece.
TAIL_RATIO_QN = 4.0


def with_tail(score, to_recording):
    """``to_recording`` with a held ending: after the last note onset a position is placed at
    least as late as the notated time since that onset, scaled by the ratio of performed to
    notated time over the last :data:`TAIL_RATIO_QN` quarter notes.

    A decaying last note gives the alignment nothing to follow, so its map tends to end early
    (a held final chord or a fermata); the notated tempo map already holds the fermata, so
    scaling it is the better lower bound there.
    """
    notes = score.notes
    if notes is None or not len(notes):
        return to_recording
    ql = float(notes["score_qn"].max())
    q4 = max(ql - TAIL_RATIO_QN, float(notes["score_qn"].min()))
    nom = score.tempo_map
    r_l, r_4 = (float(v) for v in np.atleast_1d(to_recording(np.array([ql, q4]))))
    n_l, n_4 = float(nom(ql)), float(nom(q4))
    ratio = (r_l - r_4) / (n_l - n_4) if n_l > n_4 and r_l > r_4 else 1.0

    def mapped(q):
        q = np.atleast_1d(np.asarray(q, dtype=np.float64))
        out = np.atleast_1d(np.asarray(to_recording(q), dtype=np.float64)).copy()
        late = q > ql
        if late.any():
            held = r_l + (np.atleast_1d(nom(q[late])) - n_l) * ratio
            out[late] = np.maximum(out[late], held)
        return out

    return mapped


def piece_events(score, *, piece: str, to_recording, clock, confidence=None) -> pd.DataFrame:
    """The ``piece`` row and every boundary of one aligned piece.

    Parameters
    ----------
    score : ScoreModel
        The parsed score (its ``boundaries``, ``notes`` and ``tempo_map``).
    piece : str
        Name written in the ``piece`` column.
    to_recording : callable
        ``score_qn -> recording`` seconds (the alignment's TimeMap), vectorised.
    clock : callable
        ``recording -> onset`` seconds (a :class:`~stimkit.timeline.clock.ClockFit`).
    confidence : callable, optional
        ``score_qn -> 0..1`` alignment confidence, vectorised; ``None`` leaves it missing.
    """
    to_recording = with_tail(score, to_recording)
    notes = score.notes
    q_first = float(notes["score_qn"].min()) if len(notes) else 0.0
    q_last = float((notes["score_qn"] + notes["duration_qn"]).max()) if len(notes) else score.total_qn

    def conf(q):
        if confidence is None:
            return np.full(np.size(q), np.nan)
        return np.atleast_1d(np.asarray(confidence(np.atleast_1d(q)), dtype=np.float64))

    r0, r1 = (float(v) for v in np.atleast_1d(to_recording(np.array([q_first, q_last]))))
    loc = score.locate([q_first])
    rows = [{
        "onset": float(clock(r0)), "duration": float(clock(r1) - clock(r0)), "trial_type": "piece",
        "piece": piece, "label": piece, "measure": int(loc["measure"].iloc[0]),
        "pass": int(loc["pass"].iloc[0]), "beat": float(loc["beat"].iloc[0]), "score_qn": q_first,
        "nominal": float(score.tempo_map(q_first)), "recording": r0,
        "confidence": float(np.nanmedian(conf(notes["score_qn"].to_numpy(dtype=np.float64))))
        if confidence is not None and len(notes) else np.nan,
        "source": "alignment", "part": "all",
    }]
    b = score.boundaries
    if b is not None and len(b):
        b = b[b["trial_type"] != "piece"]
    if b is not None and len(b):
        q = b["score_qn"].to_numpy(dtype=np.float64)
        rec = np.atleast_1d(to_recording(q))
        on = np.atleast_1d(clock(rec))
        nom = np.atleast_1d(score.tempo_map(q))
        cf = conf(q)
        if "end_qn" in b.columns:
            qe = pd.to_numeric(b["end_qn"], errors="coerce").to_numpy(dtype=np.float64)
        else:
            qe = np.full(q.size, np.nan)
        has_end = np.isfinite(qe) & (qe > q)
        dur = np.zeros(q.size)
        if has_end.any():
            dur[has_end] = np.atleast_1d(clock(to_recording(qe[has_end]))) - on[has_end]
        beats = _beats_inside_bars(score, b)
        for i, d in enumerate(b.to_dict("records")):  # not itertuples: "pass" is a keyword
            tt = str(d.get("trial_type"))
            if tt not in TRIAL_TYPES or tt == "piece":  # the piece row is built above, at its first note
                continue
            level = _num(d.get("value")) if tt in ("dynamic", "accent") else float("nan")
            rows.append({
                "onset": float(on[i]), "duration": float(max(dur[i], 0.0)), "trial_type": tt,
                "piece": piece, "label": _text(d.get("label")), "dynamic_level": level,
                "measure": _num(d.get("measure")), "pass": _num(d.get("pass")), "beat": float(beats[i]),
                "score_qn": float(q[i]), "nominal": float(nom[i]), "recording": float(rec[i]),
                "confidence": float(cf[i]), "source": "alignment", "part": _text(d.get("part")),
            })
    return _frame(rows)


def _beats_inside_bars(score, b: pd.DataFrame) -> np.ndarray:
    """The ``beat`` of each boundary row, NaN where it lies one past the last beat of its bar
    (a marking at the bar's end: see the module notes)."""
    beat = pd.to_numeric(b["beat"], errors="coerce").to_numpy(dtype=np.float64) if "beat" in b.columns \
        else np.full(len(b), np.nan)
    m = score.measures
    if m is None or not len(m) or "measure" not in b.columns:
        return beat
    ends = m["first_beat"].to_numpy(np.float64) + m["duration_qn"].to_numpy(np.float64) / m["beat_qn"].to_numpy(np.float64)
    end_beat = dict(zip(zip(m["measure"].astype(int), m["pass"].astype(int)), ends))
    meas = pd.to_numeric(b["measure"], errors="coerce").to_numpy(dtype=np.float64)
    pas = pd.to_numeric(b["pass"], errors="coerce").to_numpy(dtype=np.float64) if "pass" in b.columns \
        else np.ones(len(b))
    out = beat.copy()
    for i in range(len(b)):
        if not (np.isfinite(meas[i]) and np.isfinite(pas[i]) and np.isfinite(beat[i])):
            continue
        last = end_beat.get((int(meas[i]), int(pas[i])))
        if last is not None and beat[i] >= last - 1e-6:
            out[i] = np.nan
    return out


def repeat_events(repeats: list[dict], score, *, piece: str, to_recording, clock) -> pd.DataFrame:
    """``repeat`` rows from an alignment's repeat decisions (``AlignResult.repeats``): label
    ``taken`` (lasting the repeated pass) or ``skipped`` (duration 0 where it was left out), with
    the first printed bar of the repeated material in ``measure``."""
    rows = []
    for r in repeats or []:
        q0, q1 = float(r["score_qn_start"]), float(r["score_qn_end"])
        t0, t1 = float(to_recording(q0)), float(to_recording(q1))
        loc = score.locate([q0]).iloc[0]
        how = "" if r.get("decided") == "recording" else f", {r.get('decided', 'setting')}"
        rows.append({"onset": float(clock(t0)), "duration": max(float(clock(t1) - clock(t0)), 0.0),
                     "trial_type": "repeat", "piece": piece,
                     "label": f"{'taken' if r['taken'] else 'skipped'}: {r['label']}{how}",
                     "measure": int(r["first_measure"]) if r["taken"] else int(loc["measure"]),
                     "beat": float(loc["beat"]), "score_qn": q0, "nominal": float(score.tempo_map(q0)),
                     "recording": t0, "source": "alignment", "part": "all"})
    return _frame(rows)


def silence_events(segments: pd.DataFrame, *, clock, min_duration_s: float = 0.0) -> pd.DataFrame:
    """``silence`` rows from ``segments`` with ``start_s`` / ``end_s`` in recording seconds."""
    rows = []
    if segments is not None and len(segments):
        for s, e in zip(segments["start_s"].to_numpy(dtype=np.float64),
                        segments["end_s"].to_numpy(dtype=np.float64)):
            if not (np.isfinite(s) and np.isfinite(e)) or e - s < min_duration_s:
                continue
            rows.append({"onset": float(clock(s)), "duration": float(clock(e) - clock(s)),
                         "trial_type": "silence", "label": "silence", "recording": float(s),
                         "source": "audio", "part": None, "piece": None})
    return _frame(rows)


def sync_events(recording_s, *, clock, labels=None) -> pd.DataFrame:
    """``sync`` rows at the detected marks (``recording_s``), ``source`` = ``sync``."""
    rows = []
    for i, t in enumerate(np.atleast_1d(np.asarray(recording_s, dtype=np.float64))):
        rows.append({"onset": float(clock(t)), "duration": 0.0, "trial_type": "sync",
                     "label": labels[i] if labels is not None else f"sync mark {i + 1}",
                     "recording": float(t), "source": "sync"})
    return _frame(rows)


def change_events(changes: pd.DataFrame, *, clock, time_column: str = "recording",
                  label_column: str = "label") -> pd.DataFrame:
    """``feature_change`` rows from a table of change points in recording seconds."""
    rows = []
    if changes is not None and len(changes):
        labels = changes[label_column] if label_column in changes.columns else [None] * len(changes)
        for t, lab in zip(changes[time_column].to_numpy(dtype=np.float64), labels):
            if not np.isfinite(t):
                continue
            rows.append({"onset": float(clock(t)), "duration": 0.0, "trial_type": "feature_change",
                         "label": _text(lab) or "feature change", "recording": float(t),
                         "source": "audio"})
    return _frame(rows)


def merge_events(tables) -> pd.DataFrame:
    """All event rows in one table, sorted by ``onset``, ``trial_type`` order, ``label`` (stable)."""
    tables = [t for t in tables if t is not None and len(t)]
    if not tables:
        return empty_events()
    df = pd.concat([t[EVENT_COLUMNS].astype(object) for t in tables], ignore_index=True)
    rank = {k: i for i, k in enumerate(TRIAL_TYPES)}
    keys = pd.DataFrame({
        "onset": np.round(df["onset"].astype(np.float64).to_numpy(), 9),
        "rank": df["trial_type"].map(lambda v: rank.get(v, len(rank))).to_numpy(),
        "label": df["label"].map(lambda v: "" if v is None or (isinstance(v, float) and np.isnan(v))
                                 else str(v)).to_numpy(),
        "pos": np.arange(len(df)),
    })
    order = keys.sort_values(["onset", "rank", "label", "pos"], kind="mergesort").index
    out = df.loc[order].reset_index(drop=True)
    for c in ("onset", "duration", "dynamic_level", "measure", "pass", "beat", "score_qn", "nominal",
              "recording", "confidence"):
        out[c] = pd.to_numeric(out[c], errors="coerce").astype(np.float64)
    return out


def beat_table(score, *, piece: str, to_recording, clock) -> pd.DataFrame:
    """Every bar and beat: ``onset, piece, measure, pass, beat, is_downbeat, score_qn, recording``."""
    to_recording = with_tail(score, to_recording)
    g = score.beat_grid()
    q = g["score_qn"].to_numpy(dtype=np.float64)
    rec = np.atleast_1d(to_recording(q)) if q.size else np.zeros(0)
    return pd.DataFrame({
        "onset": np.atleast_1d(clock(rec)) if q.size else np.zeros(0),
        "piece": piece,
        "measure": g["measure"].to_numpy(),
        "pass": g["pass"].to_numpy(),
        "beat": g["beat"].to_numpy(dtype=np.float64),
        "is_downbeat": g["is_downbeat"].to_numpy(dtype=bool),
        "score_qn": q,
        "recording": rec,
    })
