"""Structural boundaries of a performed score, and note velocities from its dynamics.

What it computes
----------------
From the notes and markings already placed in performed order (:mod:`stimkit.score.parse`):

- :func:`tempo_events` -- the tempo indications, merged across parts, with priorities and
  conflicts (feeds :mod:`stimkit.score.tempomap`), and the fermata holds;
- :func:`note_table` -- the ``notes`` table with a velocity from the dynamics in force;
- :func:`boundaries` -- one row per marking (the ``boundaries`` table, columns
  :data:`BOUNDARY_TABLE_COLUMNS`), ``trial_type`` levels from :data:`stimkit.levels.TRIAL_TYPES`.

Conventions
-----------
- Positions in ``score_qn`` (performed); ``measure`` as printed, ``pass``, 1-based ``beat``.
- ``end_qn`` is the end of a marking that spans time (hairpin, fermata, pause, piece), else n/a.
- ``nominal`` / ``nominal_end``: seconds at the notated tempo (the tempo map).
- ``value`` by ``trial_type``: dynamic and accent -> level 1..10 (pppp=1 ... ffff=10, see
  :data:`DYNAMIC_LEVELS`); hairpin -> +1 crescendo / -1 diminuendo; tempo and tempo_change ->
  quarter-note BPM in force after the mark (a ramp: at its end); fermata -> held duration in qn;
  key -> sharps (negative for flats); meter -> bar length in quarter notes; pause -> silent
  length in qn; piece -> performed length in qn; section -> n/a.
- The same marking at (nearly) the same place in several parts is one row; ``part`` lists the
  parts carrying it (``all`` when every part does). Tolerances: ``SAME_PLACE_QN`` for
  dynamics/accents/fermatas, ``GLOBAL_SAME_PLACE_QN`` for tempo, key, meter and sections.
- Velocities: :data:`VELOCITY`, derived here from a stated rule, not taken from any program:
  the ten notated levels pppp..ffff are **equal steps of level in dB** spread over the whole
  range of the project's velocity -> level law (:data:`LEVEL_RANGE_DB` = 40 dB from velocity 1
  to 127, linear in dB; :mod:`stimkit.align.template` uses the same law), so pppp = velocity 1
  (-40 dB), ffff = 127 (0 dB) and each step is 40/9 = 4.4 dB (14 velocity units). Equal dB
  steps are equal loudness *ratios* under Stevens' power law (loudness doubles per ~10 dB [2]_):
  about x1.36 per step. A step of 3-6 dB between neighbouring dynamics is what performers
  produce on average (*from memory; rule of thumb*). ``mf`` before the first dynamic; hairpins
  ramp linearly towards the next dynamic (or one level); an accent raises its note by one step,
  a strong accent (marcato) by one and a half (project convention); ``fp``-type marks sound the
  first level and leave the second in force.
- After a jump back (repeat, D.C., D.S.) the tempo, dynamic and key the target bar had on its
  first pass are resumed unless a mark sits there (an inferred ``tempo_change`` row says so).
- General pause: every part silent for at least the length of the bar where the silence starts,
  or a silence holding a fermata rest; a "long silence" is any other silence of at least
  ``LONG_SILENCE_S`` nominal seconds.

References
----------
.. [1] MusicXML 4.0 dynamics element (W3C Music Notation Community Group): the names pppp..ffff,
   sf, sfz, sffz, fz, rf, rfz, fp, sfp, sfpp, pf.
.. [2] Stevens, S. S. (1957). On the psychophysical law. Psychological Review 64(3), 153-181.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from ..levels import TRIAL_TYPES
from .model import BOUNDARY_COLUMNS, BOUNDARY_EXTRA_COLUMNS, NOTE_COLUMNS, ScoreModel
from .words import classify_tempo_text, word_quarter_bpm

__all__ = ["MarkingContext", "tempo_events", "note_table", "boundaries", "DYNAMIC_LEVELS",
           "ACCENTS", "VELOCITY", "LEVEL_RANGE_DB", "LEVEL_STEP_DB", "ACCENT_VELOCITY", "BOUNDARY_TABLE_COLUMNS", "BOUNDARY_EXTRA_COLUMNS",
           "LONG_SILENCE_S", "SAME_PLACE_QN", "GLOBAL_SAME_PLACE_QN", "velocity_of_level"]

DYNAMIC_LEVELS = {"pppp": 1, "ppp": 2, "pp": 3, "p": 4, "mp": 5, "mf": 6, "f": 7, "ff": 8,
                  "fff": 9, "ffff": 10}
#: accent mark -> (momentary level, level left in force or None)
ACCENTS = {"sf": (8, None), "sfz": (8, None), "sffz": (9, None), "fz": (8, None), "ffz": (9, None),
           "rf": (7, None), "rfz": (8, None), "sfzp": (8, 4), "fp": (7, 4), "sfp": (8, 4),
           "sfpp": (8, 3), "ffp": (8, 4), "pf": (4, 7), "fzp": (8, 4)}
#: velocity -> level law of the project (dB over velocity 1..127, linear in dB)
LEVEL_RANGE_DB = 40.0
#: dB between neighbouring dynamic levels: the law's range in nine equal steps (pppp..ffff)
LEVEL_STEP_DB = LEVEL_RANGE_DB / 9


def _velocity_of_db(db: float) -> int:
    """Velocity whose level is ``db`` (<= 0) under the 40 dB law: 127 + 126 db / 40."""
    return int(round(127 + 126 * db / LEVEL_RANGE_DB))


#: dynamic level 1..10 -> MIDI velocity; level k sits (10 - k) equal steps below ffff
VELOCITY = {k: _velocity_of_db(-(10 - k) * LEVEL_STEP_DB) for k in range(1, 11)}
#: velocity added by an accent (one level step) and a strong accent (one and a half)
ACCENT_VELOCITY = {1: 126 * LEVEL_STEP_DB / LEVEL_RANGE_DB, 2: 1.5 * 126 * LEVEL_STEP_DB / LEVEL_RANGE_DB}
DEFAULT_LEVEL = 6
LONG_SILENCE_S = 2.0
SAME_PLACE_QN = 0.26
GLOBAL_SAME_PLACE_QN = 1.01
BOUNDARY_TABLE_COLUMNS = BOUNDARY_COLUMNS + BOUNDARY_EXTRA_COLUMNS
_HAIRPIN_WORDS = {"cresc": 1, "cresc.": 1, "crescendo": 1, "dim": -1, "dim.": -1, "diminuendo": -1,
                  "decresc": -1, "decresc.": -1, "decrescendo": -1, "poco a poco cresc.": 1}
_TYPE_ORDER = {t: k for k, t in enumerate(TRIAL_TYPES)}
#: music21 repeat-expression class name -> label
_REPEAT_MARK_LABELS = {"DaCapo": "D.C.", "DaCapoAlFine": "D.C. al Fine", "DaCapoAlCoda": "D.C. al Coda",
                       "DalSegno": "D.S.", "DalSegnoAlFine": "D.S. al Fine", "DalSegnoAlCoda": "D.S. al Coda",
                       "AlSegno": "al Segno", "Segno": "segno", "Coda": "coda", "Fine": "Fine"}


def _velocity(level):
    """MIDI velocity (float, unrounded) of dynamic level(s) 1..10, linear between the table's entries."""
    ks = np.arange(1, 11)
    return np.interp(np.clip(level, 1, 10), ks, [VELOCITY[k] for k in ks])


def velocity_of_level(level: float) -> int:
    """MIDI velocity of a dynamic level 1..10 (linear between the table's entries)."""
    return int(round(_velocity(level)))


@dataclass
class MarkingContext:
    """Performed notes and events of one score (built by :func:`stimkit.score.parse.load_score`)."""

    model: ScoreModel
    events: pd.DataFrame
    notes: pd.DataFrame
    printed: object
    path: Path
    jumps: list = None  # (qn after the jump, qn of the target bar's first pass, bar number)


def _cluster(qns: np.ndarray, tol: float) -> np.ndarray:
    """Cluster ids of sorted positions: a new cluster when > tol after the cluster's first."""
    ids = np.zeros(len(qns), dtype=int)
    start = None
    c = -1
    for j, q in enumerate(qns):
        if start is None or q - start > tol:
            c += 1
            start = q
        ids[j] = c
    return ids


def _part_label(names, all_parts) -> str:
    s = [p for p in all_parts if p in set(names)]
    if len(s) == len(all_parts):
        return "all"
    return ", ".join(s)


# --------------------------------------------------------------------------------------------
# tempo
# --------------------------------------------------------------------------------------------
def _fmt_bpm(v: float) -> str:
    return f"{v:.0f}" if abs(v - round(v)) < 0.05 else f"{v:.1f}"


_SOURCE_WORDS = {"metronome mark": "printed", "sound tempo": "played by the file"}


def _tempo_conflict(best: dict, said: list[tuple[float, str, str]], *, multi: bool) -> str:
    """Plain words for tempo indications that disagree at one place, with the one used and why."""
    seen = []
    for v, src, part in said:
        txt = f"quarter = {_fmt_bpm(v)} {_SOURCE_WORDS.get(src, src)}" + (f" in {part}" if multi else "")
        if txt not in seen:
            seen.append(txt)
    why = ("the printed mark is what the performers read; the file's playback tempo is a setting of "
           "the program that wrote it" if best["source"] == "metronome mark" else
           "the first part's value")
    return (f"bar {best['measure']}: tempo marks disagree ({'; '.join(seen)}); quarter = "
            f"{_fmt_bpm(best['bpm'])} is used: {why}")


def _plausible(bpm: float, what: str, r, model) -> float:
    """``bpm`` when it lies in the plausible range (:data:`stimkit.score.tempomap.MIN_BPM` ..
    ``MAX_BPM`` quarter notes per minute), else NaN with a warning (the mark is ignored)."""
    from .tempomap import MAX_BPM, MIN_BPM

    if not np.isfinite(bpm) or MIN_BPM <= bpm <= MAX_BPM:
        return bpm
    model.warnings.append(f"bar {r.measure}: the {what} is outside {MIN_BPM:g}-{MAX_BPM:g} quarter notes "
                          "per minute, the range of real tempo marks; it is ignored and the tempo in "
                          "force before it continues")
    return float("nan")


def tempo_events(ctx: MarkingContext) -> tuple[list[dict], list[tuple[float, float]]]:
    """Tempo events (merged across parts) and fermata holds, in performed order.

    Priority at one place: a notated metronome number, then a ``<sound tempo>`` alone, then a
    tempo word (project BPM). Disagreements and marks carried by one part only (in a score with
    several parts) are reported in the model's warnings.
    """
    model, ev = ctx.model, ctx.events
    meas = model.measures
    cands = []
    beat_qn_of = meas["beat_qn"].to_numpy(dtype=float)
    if not ev.empty:
        sel = ev[ev["kind"].isin(["metronome", "words"])].sort_values(["score_qn", "part"], kind="mergesort")
        for r in sel.itertuples(index=False):
            beat_qn = float(beat_qn_of[int(r.perf)])
            if r.kind == "metronome":
                num, snd, rq = r.num, r.num2, r.ref_ql if np.isfinite(r.ref_ql) else 1.0
                written = float(num) * rq if np.isfinite(num) else np.nan
                sounding = float(snd) if np.isfinite(snd) else np.nan
                for v in (num, snd):
                    if np.isfinite(v) and v <= 0:
                        raise InputError(f"tempo mark at bar {r.measure} is {v:g} BPM; a tempo must "
                                         "be positive; fix the score", path=ctx.path)
                written, sounding = _plausible(written, f"printed tempo mark ({r.text2 or 'quarter'} = "
                                               f"{num:g})" if np.isfinite(num) else "", r, model), \
                    _plausible(sounding, f"playback tempo (quarter = {snd:g})" if np.isfinite(snd) else "",
                               r, model)
                if np.isfinite(written):
                    ref_name = (r.text2 or "quarter").lower()
                    cands.append(dict(qn=r.score_qn, kind="tempo", bpm=written, prio=1, part=r.part_name,
                                      label=f"{ref_name} = {_fmt_bpm(float(num))}", word=r.text or "",
                                      source="metronome mark", sounding=sounding, measure=r.measure,
                                      pass_=r.pass_))
                elif np.isfinite(sounding):
                    cands.append(dict(qn=r.score_qn, kind="tempo", bpm=sounding, prio=2, part=r.part_name,
                                      label=f"quarter = {_fmt_bpm(sounding)}", word=r.text or "",
                                      source="sound tempo", sounding=sounding, measure=r.measure,
                                      pass_=r.pass_))
                if r.text:
                    w = classify_tempo_text(r.text)
                    if w is not None and w.kind != "tempo":
                        cands.append(_word_cand(r, w, beat_qn))
            else:
                w = classify_tempo_text(r.text)
                if w is not None:
                    cands.append(_word_cand(r, w, beat_qn))
    out: list[dict] = []
    one_part: list[str] = []
    if cands:
        cdf = sorted(cands, key=lambda c: (c["qn"], c["prio"]))
        ids = _cluster(np.array([c["qn"] for c in cdf]), GLOBAL_SAME_PLACE_QN)
        for cid in np.unique(ids):
            group = [c for c, g in zip(cdf, ids) if g == cid]
            numbered = any(c["kind"] == "tempo" and c["prio"] <= 2 for c in group)
            for kind in ("tempo", "relative", "return", "ramp"):
                gk = [c for c in group if c["kind"] == kind]
                if kind in ("relative", "return") and numbered:
                    # "Tempo I, q = 84" or "più mosso, q = 120": the number rules, the word labels it
                    gk = []
                if not gk:
                    continue
                best = min(gk, key=lambda c: (c["prio"], c["qn"]))
                parts = list(dict.fromkeys(c["part"] for c in gk))
                e = dict(best)
                e["parts"] = parts
                e["qn"] = min(c["qn"] for c in gk)
                if kind == "tempo":
                    said = [(c["bpm"], c["source"], c["part"]) for c in gk if c["prio"] <= 2]
                    said += [(c["sounding"], "sound tempo", c["part"]) for c in gk
                             if c["prio"] == 1 and np.isfinite(c.get("sounding", np.nan))]
                    if len({round(v, 1) for v, _s, _p in said}) > 1:
                        model.warnings.append(_tempo_conflict(best, said, multi=len(model.parts) > 1))
                    word_text = ", ".join(dict.fromkeys(
                        c["word"].strip() for c in group
                        if c.get("word") and c["kind"] != "ramp" and c["word"].strip()))
                    if best["prio"] < 3 and word_text:
                        e["label"] = f"{word_text} ({best['label']})"
                    e["detail"] = (f"{best['source']}; quarter = {_fmt_bpm(best['bpm'])}"
                                   if best["prio"] < 3 else best["detail"])
                out.append(e)
                if len(model.parts) > 1 and len(parts) == 1:
                    one_part.append(f"{best['measure']} ({parts[0]})")
    if one_part:
        model.warnings.append("tempo marks carried by one part only, applied to all parts: bars "
                              + ", ".join(one_part))
    out.sort(key=lambda e: (e["qn"], ("tempo", "return", "relative", "ramp").index(e["kind"])))
    # fermatas
    ferm: list[tuple[float, float]] = []
    if not ev.empty:
        f = ev[ev["kind"] == "fermata"].sort_values("score_qn")
        if not f.empty:
            ids = _cluster(f["score_qn"].to_numpy(), SAME_PLACE_QN)
            for cid in np.unique(ids):
                g = f[ids == cid]
                ferm.append((float(g["score_qn"].min()), float(g["dur"].max())))
    return out, ferm


def bpm_at(tmap, q: float) -> float:
    """Quarter BPM in force at ``q`` from the tempo map's segments (fermatas not counted)."""
    for s in tmap.meta.get("segments", []):
        if s["from_qn"] - 1e-9 <= q < s["to_qn"] - 1e-9:
            f = (q - s["from_qn"]) / max(s["to_qn"] - s["from_qn"], 1e-12)
            return s["bpm_start"] + f * (s["bpm_end"] - s["bpm_start"])
    segs = tmap.meta.get("segments", [])
    return segs[-1]["bpm_end"] if segs else float("nan")


def restore_after_jumps(ctx: MarkingContext, events: list[dict], tmap) -> list[dict]:
    """Tempo events restoring, after a jump back (repeat, D.C., D.S.), the tempo the target bar
    had on its first pass -- unless a tempo mark sits at the target or the tempo is the same
    (within 1 %). Musicians resume the section's tempo, not the tempo of the bar before the jump
    (e.g. after a rit. at the end of a first ending)."""
    out = []
    for q_now, q_first, bar in ctx.jumps or []:
        if any(abs(e["qn"] - q_now) < 1e-6 and e["kind"] != "ramp" for e in events):
            continue
        b_target, b_before = bpm_at(tmap, q_first), bpm_at(tmap, q_now - 1e-6)
        if not (np.isfinite(b_target) and np.isfinite(b_before)) or abs(b_target - b_before) <= 0.01 * b_before:
            continue
        out.append(dict(qn=q_now, kind="tempo", bpm=float(b_target), prio=0, parts=list(ctx.model.parts),
                        label=f"tempo of bar {bar} resumed", word="", source="inferred", measure=bar,
                        detail="inferred: after a jump back the tempo the bar had on its first pass "
                               f"(quarter = {_fmt_bpm(b_target)})"))
    return out


def _word_cand(r, w, beat_qn) -> dict:
    base = dict(qn=r.score_qn, part=r.part_name, word=r.text, measure=r.measure,
                pass_=r.pass_, label=r.text.strip(), sounding=np.nan, prio=3)
    if w.kind == "tempo":
        bpm = word_quarter_bpm(w.bpm, beat_qn=beat_qn)
        return dict(base, kind="tempo", bpm=bpm, source="tempo word",
                    detail=f"tempo word '{w.matched}': nominal {w.bpm:g} beats per minute "
                           f"(project convention) = quarter {_fmt_bpm(bpm)}")
    if w.kind == "ramp":
        return dict(base, kind="ramp", direction=w.direction, source="tempo word",
                    detail=("gradual slowing" if w.direction < 0 else "gradual quickening")
                    + " to the next tempo mark (default depth, see tempo_map settings)")
    if w.kind == "relative":
        return dict(base, kind="relative", factor=w.factor, source="tempo word",
                    detail=f"immediate change x{w.factor:g} of the current tempo (project convention)")
    return dict(base, kind="return", target=w.target, source="tempo word",
                detail="back to the tempo before the last change" if w.target == "previous"
                else "back to the first tempo of the piece")


# --------------------------------------------------------------------------------------------
# notes with velocity
# --------------------------------------------------------------------------------------------
def _dynamic_steps(ev: pd.DataFrame, part: str):
    """(qn, level in force after, momentary level or nan) for one part (all its staves), sorted."""
    d = ev[(ev["kind"] == "dynamic") & (ev["part_name"] == part)].sort_values("score_qn", kind="mergesort")
    steps = []
    for q, t in zip(d["score_qn"], d["text"]):
        t = str(t).strip().lower()
        if t in DYNAMIC_LEVELS:
            steps.append((float(q), DYNAMIC_LEVELS[t], np.nan))
        elif t in ACCENTS:
            mom, after = ACCENTS[t]
            steps.append((float(q), after if after is not None else np.nan, mom))
    return steps


def note_table(ctx: MarkingContext) -> pd.DataFrame:
    """The ``notes`` table (:data:`stimkit.score.model.NOTE_COLUMNS`) with velocities."""
    pn, ev, model = ctx.notes, ctx.events, ctx.model
    vel = np.full(len(pn), float(VELOCITY[DEFAULT_LEVEL]))
    q_all = pn["score_qn"].to_numpy(dtype=float)
    part_all = pn["part_name"].to_numpy()
    for part in np.unique(part_all):
        idx = np.flatnonzero(part_all == part)
        q = q_all[idx]
        steps = _dynamic_steps(ev, part) if not ev.empty else []
        if steps and ctx.jumps:
            # after a jump back, the dynamic the target bar had on its first pass
            extra = []
            for q_now, q_first, _bar in ctx.jumps:
                if any(abs(s[0] - q_now) < 1e-6 for s in steps):
                    continue
                in_force = DEFAULT_LEVEL
                for s in steps:
                    if s[0] <= q_first + 1e-6 and np.isfinite(s[1]):
                        in_force = s[1]
                extra.append((q_now, in_force, np.nan))
            steps = sorted(steps + extra, key=lambda s: s[0])
        level = np.full(len(idx), float(DEFAULT_LEVEL))
        cur = DEFAULT_LEVEL
        qs = [s[0] for s in steps]
        lv = []
        for s in steps:
            if np.isfinite(s[1]):
                cur = s[1]
            lv.append(cur)
        if steps:
            k = np.searchsorted(np.array(qs), q + 1e-6, side="right") - 1
            has = k >= 0
            level[has] = np.array(lv, dtype=float)[k[has]]
        # hairpins
        if not ev.empty:
            wedges = ev[(ev["kind"] == "wedge") & (ev["part_name"] == part)]
            for w in wedges.itertuples(index=False):
                q0, q1 = float(w.score_qn), float(w.end_qn)
                if q1 <= q0:
                    continue
                d = 1 if w.text == "crescendo" else -1
                j0 = np.searchsorted(qs, q0 + 1e-6, side="right") - 1
                l0 = lv[j0] if j0 >= 0 else DEFAULT_LEVEL
                nxt = [(sq, sl) for sq, sl in zip(qs, lv) if q1 - 1e-6 <= sq <= q1 + 4.0]
                l1 = nxt[0][1] if nxt and (nxt[0][1] - l0) * d > 0 else l0 + d
                inside = (q >= q0) & (q < q1)
                level[inside] = l0 + (l1 - l0) * (q[inside] - q0) / (q1 - q0)
                if not (nxt and (nxt[0][1] - l0) * d > 0):
                    later = [sq for sq in qs if sq >= q1 - 1e-6]
                    stop = later[0] if later else np.inf
                    level[(q >= q1) & (q < stop)] = l1
        v = _velocity(level)
        # accents: momentary marks and articulation accents
        for s in steps:
            if np.isfinite(s[2]):
                hit = np.abs(q - s[0]) < 1e-3
                v[hit] = np.maximum(v[hit], VELOCITY[int(s[2])])
        acc = pn["accent"].to_numpy()[idx]
        v = v + np.where(acc == 2, ACCENT_VELOCITY[2], np.where(acc == 1, ACCENT_VELOCITY[1], 0.0))
        vel[idx] = v
    if getattr(ctx.printed, "is_midi", False) and "vel" in pn:
        given = pn["vel"].to_numpy(dtype=float)
        vel = np.where(np.isfinite(given), given, vel)  # a MIDI file's own velocities
    vel = np.clip(np.round(vel), 1, 127).astype(int)
    loc = model.locate(q_all) if len(pn) else pd.DataFrame({"measure": [], "pass": [], "beat": []})
    out = pd.DataFrame({
        "score_qn": q_all,
        "duration_qn": pn["dur"].to_numpy(dtype=float),
        "pitch": pn["pitch"].to_numpy(dtype=int),
        "velocity": vel,
        "part": pn["part_name"].to_numpy(),
        "measure": pn["measure"].to_numpy(dtype=int),
        "pass": pn["pass_"].to_numpy(dtype=int),
        "beat": loc["beat"].to_numpy(dtype=float),
    })
    out = out.sort_values(["score_qn", "pitch", "part"], kind="mergesort").reset_index(drop=True)
    return out[NOTE_COLUMNS]


# --------------------------------------------------------------------------------------------
# boundaries
# --------------------------------------------------------------------------------------------
def _row(trial_type, label, qn, *, part="all", value=np.nan, detail="", end_qn=np.nan, at_end=False):
    return dict(trial_type=trial_type, label=label, score_qn=float(qn), part=part, value=value,
                detail=detail, end_qn=end_qn, at_end=at_end)


def _merge_parts(rows: list[dict], all_parts: list[str], tol: float) -> list[dict]:
    """One row per (trial_type, label) at nearly the same place; ``part`` lists the parts."""
    out = []
    rows = sorted(rows, key=lambda r: (r["trial_type"], r["label"], r["score_qn"]))
    key = None
    group: list[dict] = []

    def flush():
        if not group:
            return
        r = dict(group[0])
        names = [g["part"] for g in group]
        r["part"] = _part_label(names, all_parts)
        if r["trial_type"] == "key":
            # the written key of every transposing part merged into this concert-pitch row
            extra = [seg for g in group[1:] for seg in g["detail"].split("; ")
                     if seg.startswith("written ") and seg not in r["detail"]]
            if extra:
                r["detail"] += "; " + "; ".join(dict.fromkeys(extra))
        ends = [g["end_qn"] for g in group if np.isfinite(g["end_qn"])]
        r["end_qn"] = max(ends) if ends else np.nan
        out.append(r)

    for r in rows:
        k = (r["trial_type"], r["label"])
        if group and (k != key or r["score_qn"] - group[0]["score_qn"] > tol):
            flush()
            group = []
        key = k
        group.append(r)
    flush()
    return out


def _key_label(sharps: int, mode: str, tonic: str) -> tuple[str, str]:
    from music21 import key as m21key

    if mode and tonic:
        return f"{tonic.replace('-', 'b')} {mode}", "key signature with notated mode"
    ks = m21key.KeySignature(int(sharps))
    maj = ks.asKey("major").tonic.name.replace("-", "b")
    mnr = ks.asKey("minor").tonic.name.replace("-", "b")
    acc = "sharp" if sharps > 0 else "flat"
    n = abs(int(sharps))
    sig = "no sharps or flats" if n == 0 else f"{n} {acc}{'s' if n > 1 else ''}"
    return f"{sig} ({maj} major / {mnr} minor)", "key signature; mode not notated"


def _written_note(r) -> str:
    """'; written D major in Clarinet in Bb (sounds a major second lower than written)' for a key
    of a transposing part (the loader stores keys at concert pitch), else ''."""
    w = getattr(r, "written", None)
    if not isinstance(w, tuple):
        return ""
    lab, _ = _key_label(*w)
    return f"; written {lab} in {r.part_name} ({r.text3})"


def boundaries(ctx: MarkingContext, *, tempo_events: list[dict]) -> pd.DataFrame:
    """The boundaries table: one row per marking, sorted by ``score_qn`` then kind."""
    model, ev, notes = ctx.model, ctx.events, ctx.notes
    parts = model.parts
    meas = model.measures
    rows: list[dict] = []
    local: list[dict] = []  # merged with SAME_PLACE_QN
    glob: list[dict] = []  # merged with GLOBAL_SAME_PLACE_QN
    end_q = model.total_qn
    note_end = float((notes["score_qn"] + notes["dur"]).max())
    bar_len_of = meas["duration_qn"].to_numpy(dtype=float)
    first_q = float(notes["score_qn"].min())

    # piece
    n_printed = len(ctx.printed.bars)
    rows.append(_row("piece", model.name, first_q, end_qn=max(note_end, first_q + 1e-6),
                     value=end_q,
                     detail=f"{len(meas)} bars performed ({n_printed} printed)"
                     + ("" if model.repeats_expanded else ", repeats not expanded")))
    if not ev.empty:
        # dynamics and accents
        d = ev[ev["kind"] == "dynamic"]
        for r in d.itertuples(index=False):
            t = str(r.text).strip()
            tl = t.lower()
            if tl in DYNAMIC_LEVELS:
                local.append(_row("dynamic", tl, r.score_qn, part=r.part_name, value=DYNAMIC_LEVELS[tl],
                                  detail=f"level {DYNAMIC_LEVELS[tl]} of 10 (pppp=1 ... ffff=10)"))
            elif tl in ACCENTS:
                mom, after = ACCENTS[tl]
                det = f"momentary accent, level {mom} of 10"
                if after is not None:
                    det += f", then level {after} in force"
                local.append(_row("accent", tl, r.score_qn, part=r.part_name, value=mom, detail=det))
            else:
                model.warnings.append(f"bar {r.measure}: dynamic '{t}' is not a known level; kept "
                                      "without a numeric level")
                local.append(_row("dynamic", t or "?", r.score_qn, part=r.part_name,
                                  detail="dynamic mark without a known level"))
        # hairpins
        for r in ev[ev["kind"] == "wedge"].itertuples(index=False):
            dirn = 1 if r.text == "crescendo" else -1
            local.append(_row("hairpin", r.text, r.score_qn, part=r.part_name, value=dirn,
                              end_qn=min(float(r.end_qn), end_q), detail="wedge"))
        words = ev[ev["kind"] == "words"]
        for r in words.itertuples(index=False):
            t = " ".join(str(r.text).split()).lower()
            if t in _HAIRPIN_WORDS:
                # ends at the part's next dynamic, else after one bar
                dd = d[(d["part"] == r.part) & (d["score_qn"] > r.score_qn + 1e-6)]
                bar_len = float(bar_len_of[int(r.perf)])
                e = float(dd["score_qn"].min()) if not dd.empty else r.score_qn + bar_len
                lab = "crescendo" if _HAIRPIN_WORDS[t] > 0 else "diminuendo"
                local.append(_row("hairpin", lab, r.score_qn, part=r.part_name, value=_HAIRPIN_WORDS[t],
                                  end_qn=min(e, end_q), detail=f"written '{r.text.strip()}' (no wedge); "
                                  "ends at the next dynamic or after one bar"))
        # fermatas
        f = ev[ev["kind"] == "fermata"].sort_values("score_qn", kind="mergesort")
        groups: list[list] = []
        for r in f.itertuples(index=False):
            a, b = float(r.score_qn), float(r.score_qn + r.dur)
            if groups and a < groups[-1][1] - 1e-9:
                groups[-1][1] = max(groups[-1][1], b)
                groups[-1][2].append(r.part_name)
                groups[-1][3].add(r.text)
            else:
                groups.append([a, b, [r.part_name], {r.text}])
        for a, b, pn_, kinds in groups:
            rows.append(_row("fermata", "fermata", a, part=_part_label(pn_, parts), value=b - a, end_qn=b,
                             detail="on " + " and ".join(sorted(f"a {k}" for k in kinds))
                             + "; held longer (see tempo_map settings: fermata_factor)"))
        # sections: rehearsal marks, barlines, repeat marks
        for r in ev[ev["kind"] == "rehearsal"].itertuples(index=False):
            glob.append(_row("section", f"rehearsal mark {r.text.strip()}", r.score_qn, part=r.part_name,
                             detail="rehearsal mark"))
        for r in ev[ev["kind"] == "repeatmark"].itertuples(index=False):
            bar_len = float(bar_len_of[int(r.perf)])
            glob.append(_row("section", _REPEAT_MARK_LABELS.get(r.text, r.text), r.score_qn, part=r.part_name,
                             detail="repeat instruction", at_end=r.off >= bar_len - 1e-9 and r.off > 0))
        for r in ev[ev["kind"] == "barline"].itertuples(index=False):
            side, btype, direction = (str(r.text).split(":") + ["", "", ""])[:3]
            if direction == "start":
                lab = "repeat start"
            elif direction == "end":
                lab = "repeat end"
            elif btype in ("double", "light-light"):
                lab = "double bar"
            elif btype in ("final", "light-heavy"):
                lab = "final bar"
            elif btype in ("heavy-light", "heavy-heavy", "heavy"):
                lab = "section bar"
            else:
                continue
            q = r.score_qn
            glob.append(_row("section", lab, q, part=r.part_name, at_end=side != "left",
                             detail=f"{btype or 'repeat'} barline at the {'start' if side == 'left' else 'end'} "
                                    f"of bar {r.measure}"))
        # keys, in force per performed bar
        k = ev[ev["kind"] == "key"]
        for part in sorted(k["part"].unique()):
            kp = k[k["part"] == part].sort_values(["perf"], kind="mergesort")
            items = [(float(r.score_qn), (int(r.num), r.text, r.text2), r.part_name, int(r.perf) == 0,
                      _written_note(r)) for r in kp.itertuples(index=False)]
            for q_now, q_first, bar in ctx.jumps or []:
                # after a jump back: the key the target bar had on its first pass
                if any(abs(it[0] - q_now) < 1e-6 for it in items):
                    continue
                before = [it for it in items if it[0] <= q_first + 1e-6 and "after the jump" not in it[4]]
                if before:
                    items.append((q_now, before[-1][1], before[-1][2], False,
                                  before[-1][4] + f"; in force at bar {bar} on its first pass (after the jump)"))
            items.sort(key=lambda it: it[0])
            prev = None
            for q, cur, pname, at_start, note_ in items:
                if prev is not None and cur == prev and not at_start:
                    continue
                lab, det = _key_label(*cur)
                row = _row("key", lab, q, part=pname, value=cur[0], detail=det + note_)
                glob.append(row)
                prev = cur
    # meters in force per performed bar (first part's bars)
    prev = None
    for j, r in enumerate(meas.itertuples(index=False)):
        cur = (r.numerator, r.denominator)
        if cur != prev:
            bar_qn = 4.0 * r.numerator / r.denominator
            rows.append(_row("meter", f"{r.numerator}/{r.denominator}", r.score_qn, value=bar_qn,
                             detail=f"beat = {r.beat_qn:g} quarter notes"))
        prev = cur
    # tempo
    for e in tempo_events:
        tt = "tempo" if e["kind"] == "tempo" and e.get("source") != "inferred" else "tempo_change"
        rows.append(_row(tt, e["label"], e["qn"], part=_part_label(e["parts"], parts),
                         value=e.get("bpm_after", np.nan), detail=e.get("detail", ""),
                         end_qn=e.get("end_qn", np.nan) if e["kind"] == "ramp" else np.nan))
    rows += _merge_parts(local, parts, SAME_PLACE_QN)
    rows += _merge_parts(glob, parts, GLOBAL_SAME_PLACE_QN)
    rows += _pauses(ctx)
    df = pd.DataFrame(rows)
    q = df["score_qn"].to_numpy(dtype=float)
    at_end = df["at_end"].to_numpy(dtype=bool)
    loc = model.locate(np.where(at_end, q - 1e-6, q))
    starts = meas["score_qn"].to_numpy()
    bi = np.clip(np.searchsorted(starts, np.where(at_end, q - 1e-6, q) + 1e-9, side="right") - 1, 0, len(meas) - 1)
    beat = meas["first_beat"].to_numpy()[bi] + (q - starts[bi]) / meas["beat_qn"].to_numpy()[bi]
    df["measure"] = loc["measure"].to_numpy()
    df["pass"] = loc["pass"].to_numpy()
    df["beat"] = beat
    df["nominal"] = model.tempo_map(df["score_qn"].to_numpy())
    endq = df["end_qn"].to_numpy(dtype=float)
    fin = np.isfinite(endq)
    ne = np.full(len(df), np.nan)
    ne[fin] = model.tempo_map(endq[fin])
    df["nominal_end"] = ne
    df["_o"] = [_TYPE_ORDER.get(t, 99) for t in df["trial_type"]]
    df = df.sort_values(["score_qn", "_o", "label", "part"], kind="mergesort").reset_index(drop=True)
    df = df[BOUNDARY_TABLE_COLUMNS].astype({"measure": int, "pass": int})
    return df


def _pauses(ctx: MarkingContext) -> list[dict]:
    """General pauses and long silences from the union of sounding notes of all parts."""
    model, notes, ev = ctx.model, ctx.notes, ctx.events
    q = notes["score_qn"].to_numpy(dtype=float)
    e = q + notes["dur"].to_numpy(dtype=float)
    order = np.argsort(q, kind="mergesort")
    q, e = q[order], e[order]
    reach = np.maximum.accumulate(e)
    gaps_s = reach[:-1]
    gaps_e = q[1:]
    is_gap = gaps_e > gaps_s + 1e-6
    rest_ferm = np.array([], dtype=float)
    if not ev.empty:
        rf = ev[(ev["kind"] == "fermata") & (ev["text"] == "rest")]
        rest_ferm = rf["score_qn"].to_numpy(dtype=float)
    meas = model.measures
    starts = meas["score_qn"].to_numpy()
    rows = []
    for a, b in zip(gaps_s[is_gap], gaps_e[is_gap]):
        i = int(np.clip(np.searchsorted(starts, a + 1e-9, side="right") - 1, 0, len(meas) - 1))
        bar_len = float(meas["duration_qn"].iloc[i])
        secs = float(model.tempo_map(b) - model.tempo_map(a))
        has_f = bool(np.any((rest_ferm >= a - 1e-6) & (rest_ferm < b - 1e-6)))
        if b - a >= bar_len - 1e-6 or has_f:
            full = [int(m) for s, d, m in zip(meas["score_qn"], meas["duration_qn"], meas["measure"])
                    if s >= a - 1e-6 and s + d <= b + 1e-6]
            where = f"silent bars {full[0]}-{full[-1]}" if len(full) > 1 else (
                f"silent bar {full[0]}" if full else "within a bar")
            rows.append(_row("pause", "general pause" + (" (fermata)" if has_f else ""), a,
                             value=b - a, end_qn=b,
                             detail=f"all parts silent for {b - a:g} quarter notes ({where})"))
        elif secs >= LONG_SILENCE_S:
            rows.append(_row("pause", "long silence", a, value=b - a, end_qn=b,
                             detail=f"all parts silent for {secs:.1f} nominal seconds"))
    return rows
