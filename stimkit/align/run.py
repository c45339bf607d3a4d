"""Score-to-recording alignment: the recording time of every note-onset position, bar and beat.

Public functions
----------------
- :func:`align_score` -- align a parsed :class:`~stimkit.score.model.ScoreModel` to a recording
  (or to a span of it) and return an :class:`AlignResult`.
- :func:`align_files` -- load a score file (:func:`stimkit.score.parse.load_score`) and align it.
- :func:`parse_anchor` -- read ``MEASURE[.BEAT][@PASS]=SECONDS``.
- :func:`confidence_at` -- local confidence (0..1) at score positions.
- :func:`write_alignment` -- ``<name>.alignment.tsv`` and ``<name>.alignment.json`` in one
  transaction (:class:`~stimkit.export.tables.OutputSet`).
- :func:`summary_lines` -- a few lines for people.

Method
------
Score side: note-based chroma and chroma-onset templates in nominal time
(:mod:`stimkit.align.template`). Recording side: block-wise CQT chroma and DLNCO features at
49.2 Hz (:mod:`stimkit.align.chroma`). Multiscale DTW (:mod:`stimkit.align.dtw`) at 0.98 Hz over
the whole (anchor-constrained) matrix with an open start and end, then 9.8 Hz in a band of
± 1 s around the projected path, then 49.2 Hz with the onset features in a band of ± 0.5 s.
The path becomes a :class:`~stimkit.timemap.TimeMap` ``score_qn -> recording``
(:mod:`stimkit.align.warp`).

Conventions
-----------
- ``recording``: seconds from the first sample of the file, also when ``span_s`` restricts the
  search. ``score_qn``: quarter notes as performed. ``nominal``: seconds at the notated tempo.
- Anchors: ``MEASURE[.BEAT][@PASS]=SECONDS``; measure numbers as printed, beat 1-based in the bar's
  beat unit (default the bar's first beat, may be fractional as in ``12.2.5``, must lie inside
  the bar), pass 1 unless ``@PASS`` is given (``12.3@2=95.0`` is beat 3 of bar 12 the second
  time it is played).
- Lead-in: the score template starts with a second of silence to meet the silence-to-music edge
  of the recording; a recording that sounds from its first sample (:data:`SOUNDING_START_DB`)
  has no such edge, so a second of silence is put before it (features only: silence chroma, no
  onsets); without it the lead-in swallowed up to the first 1.5 s of music.
- Confidence: the Raffel--Ellis ratio (mean cost on the path ÷ mean cost of the whole cost
  matrix, estimated at the finest rate from 20 000 cell pairs drawn with a fixed seed); overall
  and local (2 s of score) values mapped to 0..1 by :func:`stimkit.align.warp.ratio_to_confidence`.
  A second test compares the unshifted alignment with the 11 chroma rotations (``key_ratio``:
  unshifted path cost ÷ best rotated path cost at about 2 Hz, coarser for long pieces): the right piece aligns far better
  in its own key. A ratio above :data:`REFUSE_RATIO` or a key ratio above
  :data:`KEY_REFUSE_RATIO` (above :data:`KEY_DOUBT_RATIO` when the unshifted key is still the
  best: between the two it is a doubt said on the terminal) is taken as a different piece and refused
  (:class:`~stimkit.errors.WorkFailed`) unless ``force=True``. The overall confidence is the
  smaller of the two ratios mapped to 0..1.
- Stated behaviour for odd input: a score without notes, a recording (or span) under 1 s and a
  silent recording (peak below -70 dBFS) are refused with :class:`~stimkit.errors.InputError`;
  a recording much longer than the score (more than 3× its nominal length) is searched for the
  piece (open start and end) and a warning gives the span found.

Known limits
------------
- An inserted passage of *other music* close in harmony to the score is partly matched to the
  score's next bars: the flagged insertion then covers only part of it (measured: 20 s of a
  chorale inserted into a piano piece flagged as 2 runs, 60-64 s and 68-74 s, for 50-70 s).
  Inserted speech, applause or silence is flagged in place (± 1-2 s).
- A passage repeated in the recording but not in the score (or the reverse) is ambiguous: either
  copy may be the one flagged.
- A performance in another key is refused as a different piece; the message gives the
  transposition that matched best.

References
----------
The multiscale DTW (Müller, Mattes & Kurth 2006; Prätzlich, Driedger & Müller 2016) and the
chroma-onset features (Ewert, Müller & Grosche 2009) are cited where they are implemented, in
:mod:`stimkit.align.dtw` and :mod:`stimkit.align.chroma`.

.. [1] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, WorkFailed
from ..timemap import TimeMap
from . import chroma as _chroma
from .dtw import StepWeights, _unit, band_margins, downsample, key_shift_costs, multiscale_dtw, path_costs
from .confidence import bridge_unsure, local_confidence, neighbourhood_min, unreliable_spans
from .ends import refit_tail
from .refine import refine
from .structure import DOUBTFUL_MARGIN, SCALE_MIN, fit_structure
from .template import HEAD_S, score_features
from .warp import (
    RATIO_BAD,
    RATIO_GOOD,
    flag_runs,
    merge_regions,
    mismatch_regions,
    recording_cost_ratio,
    local_ratio,
    path_to_timemap,
    ratio_to_confidence,
    tempo_curve,
)

__all__ = [
    "AlignResult",
    "align_score",
    "doubts",
    "check_strict",
    "align_files",
    "parse_anchor",
    "confidence_at",
    "write_alignment",
    "summary_lines",
    "REFUSE_RATIO",
    "KEY_REFUSE_RATIO",
    "KEY_DOUBT_RATIO",
    "NOTE_TABLE_COLUMNS",
]

#: Raffel--Ellis ratio above which the recording is taken to be of a different piece.
REFUSE_RATIO = 0.85
#: Key test: unshifted path cost ÷ best cost over the 11 other chroma rotations (at ~2 Hz).
#: Rendered tests: the right piece 0.4-0.65, a different piece 0.9-1.5; refused above this when
#: the recording matches the score best in another key.
KEY_REFUSE_RATIO = 0.8
#: When the score's own key is still the best of the twelve, a key ratio between KEY_REFUSE_RATIO
#: and this is a doubt, not a refusal: a reverberant hall smears the chroma of successive
#: chords into each other and raises the ratio of the right piece (0.85-0.86 measured for two
#: right pieces in a 2 s hall played on sampled instruments), while different pieces whose best
#: key was the unshifted one came out at 0.92 and above (0.97 and above on the development
#: renders). The alignment is written with a warning and counts as doubtful (``--strict``).
KEY_DOUBT_RATIO = 0.9
KEY_FACTOR = 25
KEY_MAX_CELLS = 2_000_000
#: Recordings (or spans) shorter than this are refused.
MIN_AUDIO_S = 1.0
#: Peak level under which a recording counts as silent (dBFS).
SILENT_DBFS = -70.0
#: A recording longer than this many times the score's nominal length is searched for the piece.
LONG_FACTOR = 3.0
#: A recording (or span) that could hold less than this share of the score even at the fastest
#: tempo the structure fit tries (``SCALE_MIN`` times the notated length) is refused before the
#: score's templates are built: a 600-byte score of 90,000 quarter notes against a 1 s recording
#: took 1.9 GB and 90 s before being refused as another piece. A recording of a part of the piece
#: (a third, say) is still aligned, with a warning.
MIN_SHARE_HELD = 0.1
#: Mean local-cost ratio a one-axis run needs to be flagged (a held chord matched to a longer hold
#: runs flat at low cost and is not a cut).
FLAG_MIN_RATIO = 0.6
#: One-axis runs at least this long are flagged whatever their cost (no fermata is held that long
#: beyond its notated length).
FLAG_ALWAYS_S = 10.0
#: An insertion run is trimmed to the recording frames whose path-cost ratio (1 s smoothing) is
#: at least this (inserted speech or applause measured 0.85-1.1; a held chord next to it 0.55-0.7).
TRIM_RATIO = 0.75
#: Smoothed path-cost ratio above which a stretch of recording counts as not matching.
MISMATCH_RATIO = 0.8
#: A recording whose first 0.1 s reach this level (dB re the 95th percentile of its frame
#: energies) starts with its music: there is no silence-to-music edge for the template's silent
#: lead-in, which would otherwise swallow the first second of music (rendered tests: music from
#: the first sample -14 to -1 dB, a -60 dBFS noise floor before the music below -37 dB). Such a
#: recording gets a virtual second of silence before it.
SOUNDING_START_DB = -20.0
#: The first alignment is redone once when the tempo it finds differs from the structure fit's by
#: more than this factor.
RESCALE_ABOVE = 1.1
#: Levels of the multiscale DTW (decimation of the 49.2 Hz frames) and their band radii: the
#: first level covers the whole matrix at about 5 Hz when it has at most FULL_MAX_CELLS cells
#: (a 1 Hz first level misplaced held chords by seconds), else at 2 or 1 Hz with a middle level.
LEVELS = (((10, 1), (0, 25)), ((25, 5, 1), (0, 10, 25)), ((50, 5, 1), (0, 10, 25)))
FULL_MAX_CELLS = 40_000_000
ONSET_WEIGHT = 1.0
FLAG_MIN_S = 2.0
TEMPO_WINDOW_BEATS = 6
LOCAL_WINDOW_S = 2.0
_N_REF_PAIRS = 20000

NOTE_TABLE_COLUMNS = ["score_qn", "measure", "pass", "beat", "nominal", "recording", "confidence"]
_ANCHOR_RE = re.compile(r"^\s*(-?\d+)(?:\.(\d+(?:\.\d+)?))?(?:@(\d+))?\s*=\s*([0-9]*\.?[0-9]+)\s*$")


@dataclass
class AlignResult:
    """Everything an alignment produced (see :func:`align_score`)."""

    name: str
    score: object
    timemap: TimeMap                 # score_qn -> recording
    notes: pd.DataFrame              # one row per distinct note-onset position
    beats: pd.DataFrame              # every bar and beat
    tempo: pd.DataFrame              # score_qn, recording, bpm, quarter_bpm
    confidence: dict                 # overall, raffel_ellis_ratio, coarse_ratio
    regions: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)
    local: pd.DataFrame | None = None   # score_qn, confidence along the path
    audio_path: Path | None = None
    repeats: list = field(default_factory=list)   # one dict per repeat option (see _repeat_rows)
    unreliable: list = field(default_factory=list)  # spans of low local confidence (confidence.unreliable_spans)


def parse_anchor(text: str, score=None):
    """``"12.3=45.6"`` -> ``(measure, beat, seconds)``; ``"12.3@2=45.6"`` -> ``(12, 3.0, 45.6, 2)``.

    Returns a 3-tuple for pass 1 and a 4-tuple ``(measure, beat, seconds, pass)`` when ``@PASS``
    is written. With ``score`` given, also checks that the bar exists and holds the beat, and a
    bar without a beat (``"12=45.6"``) means its first beat (a pickup bar's is not 1). Raises
    :class:`InputError` on bad syntax, a bar not in the score or a beat outside the bar.
    """
    m = _ANCHOR_RE.match(str(text))
    if not m:
        raise InputError(f"anchor {text!r} is not MEASURE[.BEAT][@PASS]=SECONDS (e.g. 12.3=45.6)")
    measure = int(m.group(1))
    beat = float(m.group(2)) if m.group(2) else 1.0
    pas = int(m.group(3)) if m.group(3) else None
    seconds = float(m.group(4))
    if score is not None:
        try:
            score.qn_at(measure, beat, pas or 1)
        except KeyError:
            raise InputError(f"anchor {text!r}: bar {measure} (pass {pas or 1}) is not in the score "
                             f"{score.name}; use a measure number as printed", path=score.path) from None
        bars = score.measures
        bar = bars[(bars["measure"] == measure) & (bars["pass"] == (pas or 1))].iloc[0]
        first = float(bar["first_beat"])
        end = first + float(bar["duration_qn"]) / float(bar["beat_qn"])
        if not m.group(2):
            beat = first    # "M=S": the start of the bar (a pickup bar starts on a later beat)
        if not first <= beat < end:
            raise InputError(f"anchor {text!r}: bar {measure} of {score.name} has beats {first:g} to "
                             f"below {end:g}, not {beat:g}; give a beat inside the bar", path=score.path)
    return (measure, beat, seconds) if pas is None else (measure, beat, seconds, pas)


def _anchor_points(score, anchors):
    """Anchors as ``(score_qn, recording_s, label)``, sorted and checked."""
    pts = []
    for a in anchors or ():
        if isinstance(a, str):
            parsed = parse_anchor(a, score)
            measure, beat, sec = parsed[:3]
            pas = parsed[3] if len(parsed) == 4 else 1
            qn = score.qn_at(measure, beat, pas)
            pts.append((float(qn), float(sec), a.strip()))
        else:
            qn, sec = float(a[0]), float(a[1])
            if not (np.isfinite(qn) and np.isfinite(sec)):
                raise InputError(f"anchor {a!r} is not finite")
            pts.append((qn, sec, f"score_qn {qn:g}={sec:g}"))
    pts.sort()
    for (q0, s0, l0), (q1, s1, l1) in zip(pts, pts[1:]):
        if not s1 > s0 or not q1 > q0:
            raise InputError(f"anchors {l0!r} and {l1!r} are not in increasing order in both score and "
                             "recording; fix or drop one")
    return pts


REPEAT_KIND_WORDS = {"repeat": "repeat", "volta": "repeat with endings", "dc": "da capo", "ds": "dal segno"}


def _repeat_rows(score, st, *, decided_by: str) -> list[dict]:
    """One dict per repeat option that matters in the performed order (see AlignResult.repeats):
    label, kind, printed bars, taken, how it was decided, its margin and its score_qn span in the
    performed order (the place it was left out, when not taken)."""
    plan = getattr(score, "repeat_plan", None)
    if plan is None or not plan.options or getattr(score, "printed", None) is None:
        return []
    choice = score.repeat_choice or plan.conventional()
    kept = plan.kept_positions(choice)
    m = score.measures
    starts = m["score_qn"].to_numpy(np.float64)
    ends = starts + m["duration_qn"].to_numpy(np.float64)
    bars = score.printed.bars
    rows = []
    for o in plan.effective(choice):
        taken = bool(choice.get(o.id, o.conventional))
        r = [k for k, pos in enumerate(kept) if o.start <= pos < o.stop]
        if taken and r:
            q0, q1 = float(starts[r[0]]), float(ends[r[-1]])
        else:
            after = [k for k, pos in enumerate(kept) if pos >= o.stop]
            q0 = q1 = float(starts[after[0]]) if after else float(score.total_qn)
        first = str(bars["label"].iloc[o.first_bar]) if "label" in bars else str(o.first_bar + 1)
        last = str(bars["label"].iloc[o.last_bar]) if "label" in bars else str(o.last_bar + 1)
        decided = decided_by if (decided_by == "setting" or o.id in st.decided) else "score"
        margin = float(st.margins.get(o.id, float("nan")))
        rows.append({
            "id": int(o.id), "kind": o.kind,
            "label": f"bars {first}–{last}, {REPEAT_KIND_WORDS.get(o.kind, o.kind)}"
                     + (" (after the jump)" if o.after_jump else ""),
            "short": (f"D.{'C' if o.kind == 'dc' else 'S'}." if o.kind in ("dc", "ds") else f"bars {first}–{last}")
                     + (" (after the jump)" if o.after_jump else ""),
            "first_measure": int(bars["measure"].iloc[o.first_bar]),
            "last_measure": int(bars["measure"].iloc[o.last_bar]),
            "taken": taken, "notated": bool(o.conventional), "decided": decided, "margin": margin,
            "doubtful": bool(decided == "recording" and np.isfinite(margin) and margin < DOUBTFUL_MARGIN),
            "score_qn_start": q0, "score_qn_end": q1,
        })
    return rows


#: Local confidence inside a flagged region (insertion, cut, mismatch) is at most this.
FLAGGED_CONFIDENCE = 0.2


def _span_text(sp: dict) -> str:
    bars = (f"bar {sp['first_measure']}" if sp["first_measure"] == sp["last_measure"]
            else f"bars {sp['first_measure']}–{sp['last_measure']}")
    return f"{bars} ({sp['start']:.1f}–{sp['end']:.1f} s)"


#: Distances (s) at which the fine-level margins are measured, and the coarse-level one.
MARGIN_DISTANCES_S = (0.1, 0.3)
COARSE_MARGIN_S = 2.0


def _margin_features(*, fine_S, fine_lo, fine_hi, fine_rows, coarse_res, coarse_S, coarse_rows, A, ref: float,
                     weights) -> dict:
    """Margins of the best path (see :func:`stimkit.align.dtw.band_margins`), in units of the mean
    local cost ``ref`` (about one mismatching frame each): at template rows ``fine_rows`` of the
    final pass, moved by 0.1 s and 0.3 s within its band; at rows ``coarse_rows`` (finest-rate
    rows of the first pass) moved by two frames (about 2 s) at the first pass's coarsest level."""
    rate = A.rate_hz
    d = tuple(max(int(round(x * rate)), 1) for x in MARGIN_DISTANCES_S)
    mf, _ = band_margins(fine_S.chroma, A.chroma, fine_lo, fine_hi, onset_s=fine_S.onset, onset_r=A.onset,
                         onset_weight=ONSET_WEIGHT, weights=weights, distances=d)
    top = coarse_res["levels"][0]
    f0 = top["factor"]
    if f0 > 1:
        mc, _ = band_margins(_unit(downsample(coarse_S.chroma, f0)), _unit(downsample(A.chroma, f0)), top["lo"],
                             top["hi"], weights=weights,
                             distances=(max(int(round(COARSE_MARGIN_S * rate / f0)), 1),))
    else:
        mc = np.full((coarse_S.n_frames, 1), np.inf)
    rows = np.clip(np.asarray(fine_rows, dtype=np.int64), 0, fine_S.n_frames - 1)
    crow = np.clip(np.asarray(coarse_rows, dtype=np.int64) // f0, 0, len(mc) - 1)
    scale = max(ref, 1e-9)
    return {"margin_100ms": mf[rows, 0] / scale, "margin_300ms": mf[rows, 1] / scale,
            "margin_coarse": mc[crow, 0] * f0 / scale}


def _tempo_deviation(tm, qn, nominal, *, window_qn: float = 4.0, context_qn: float = 32.0):
    """|log| of the performed / notated tempo ratio over ``window_qn`` around each position,
    relative to the median of that ratio over ``context_qn``: a path that rushes or stalls where
    the music does not."""
    q = np.asarray(qn, dtype=np.float64)
    if q.size == 0:
        return np.zeros(0)
    h = window_qn / 2
    rec = np.asarray(tm(q + h)) - np.asarray(tm(q - h))
    nom = np.asarray(nominal(q + h)) - np.asarray(nominal(q - h))
    r = np.log(np.maximum(rec, 1e-6) / np.maximum(nom, 1e-6))
    from scipy.ndimage import median_filter

    step = max(float(np.median(np.diff(q))) if q.size > 1 else 1.0, 1e-3)
    size = max(int(round(context_qn / step)) | 1, 1)
    return np.abs(r - median_filter(r, size=size, mode="nearest"))


def _beat_qn_of(score, qn):
    m = score.measures
    starts = m["score_qn"].to_numpy(np.float64)
    i = np.clip(np.searchsorted(starts, np.asarray(qn) + 1e-9, side="right") - 1, 0, len(m) - 1)
    return m["beat_qn"].to_numpy(np.float64)[i]


def _starts_sounding(A) -> bool:
    """Whether the recording features ``A`` begin at the file's first sample with music."""
    e = A.energy
    if A.start_s > 0.0 or e is None or e.size == 0:
        return False
    head = float(e[: max(1, int(round(0.1 * A.rate_hz)))].max())
    return head > 0.0 and 10 * np.log10(head / max(float(np.percentile(e, 95)), 1e-300)) >= SOUNDING_START_DB


def _with_silent_lead_in(A):
    """The recording features ``A`` after a virtual second of silence (the template's lead-in):
    silence chroma, no onsets, zero energy; frame 0 moves to ``-HEAD_S`` (rounded to frames)."""
    h = int(round(HEAD_S * A.rate_hz))
    chroma = np.zeros((h, A.chroma.shape[1]))
    chroma[:, -1] = 1.0        # the silence component (as finish_chroma gives digital silence)
    return _chroma.AlignFeatures(
        chroma=np.concatenate([chroma, A.chroma]),
        onset=np.concatenate([np.zeros((h, A.onset.shape[1])), A.onset]),
        rate_hz=A.rate_hz, start_s=A.start_s - h / A.rate_hz,
        energy=None if A.energy is None else np.concatenate([np.zeros(h), A.energy]),
        meta=dict(A.meta))


def _ref_cost(S, A, onset_weight):
    """Mean local cost of the whole fine matrix, estimated from a fixed sample of cells."""
    rng = np.random.default_rng(0)
    k = _N_REF_PAIRS
    pairs = np.stack([rng.integers(0, S.n_frames, k), rng.integers(0, A.n_frames, k)], axis=1)
    return float(path_costs(pairs, S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset,
                            onset_weight=onset_weight).mean())


def align_score(
    score,
    audio_path,
    *,
    anchors=(),
    force: bool = False,
    span_s: tuple[float, float] | None = None,
    repeats="auto",
    progress=None,
) -> AlignResult:
    """Align ``score`` to the recording ``audio_path``.

    Parameters
    ----------
    score : ScoreModel
        Parsed score in performed order.
    audio_path : path-like
        The recording.
    anchors : list of str or list of (score_qn, seconds)
        Known points the path must pass through: strings ``MEASURE[.BEAT][@PASS]=SECONDS``
        (:func:`parse_anchor`) or ``(score_qn, recording seconds)`` pairs.
    force : bool
        Return the alignment even when it looks like a different piece (a warning says so).
    span_s : (start, end), optional
        Search only this part of the recording (recording seconds); the times returned are still
        seconds from the first sample of the file.
    repeats : str or dict
        ``"auto"`` (default): decide from the recording which repeats were played
        (:mod:`stimkit.align.structure`); ``"all"``, ``"none"``, ``"max"`` or a mapping of
        repeat-option id -> taken: play them as given (see
        :func:`stimkit.score.parse.load_score`). The result's ``score`` is the score in the
        performed order.
    progress : callable, optional
        ``progress(task, fraction)``.

    Returns
    -------
    AlignResult

    Raises
    ------
    InputError
        A score without notes, bad anchors, an unreadable, too short or silent recording.
    WorkFailed
        The recording does not match the score (unless ``force``), or no path fits the anchors.
    """
    if score.notes is None or len(score.notes) == 0:
        raise InputError("score has no notes; nothing to align", path=score.path)
    audio_path = Path(audio_path)
    warnings: list[str] = []
    plan = getattr(score, "repeat_plan", None)
    auto = isinstance(repeats, str) and repeats == "auto"
    if isinstance(repeats, str) and repeats == "printed":
        plan = None       # the order as loaded
    if not auto and plan is not None and plan.options and getattr(score, "printed", None) is not None:
        from ..score.parse import score_for_choice

        if plan.choice(repeats) != score.repeat_choice:
            score = score_for_choice(score, repeats)
    _anchor_points(score, anchors)     # checked before the work; placed after the repeats are known

    def report(task, frac):
        if progress is not None:
            progress(task, frac)

    _check_room(score, audio_path, span_s)
    A = _chroma.audio_features(audio_path, span_s=span_s, progress=progress)
    span_len = A.meta["end_s"] - A.start_s
    if span_len < MIN_AUDIO_S:
        raise InputError(f"recording{' span' if span_s else ''} is {span_len:.2f} s long; at least "
                         f"{MIN_AUDIO_S:g} s is needed to align", path=audio_path)
    if A.meta["peak"] <= 10 ** (SILENT_DBFS / 20):
        raise InputError(f"recording{' span' if span_s else ''} is silent (peak below {SILENT_DBFS:g} "
                         "dBFS); check the file or the span", path=audio_path)
    span_start = A.start_s
    sounding_start = _starts_sounding(A)
    if sounding_start:
        A = _with_silent_lead_in(A)
    report("structure", 0.0)
    st = fit_structure(score, A, decide_repeats=auto and plan is not None, progress=progress)
    if auto and plan is not None and plan.options and st.choice != score.repeat_choice:
        from ..score.parse import score_for_choice

        score = score_for_choice(score, st.choice)
    repeat_rows = _repeat_rows(score, st, decided_by="recording" if auto else "setting")
    for r in repeat_rows:
        if r.get("doubtful"):
            warnings.append(f"{r['label']}: {'taken' if r['taken'] else 'left out'} is doubtful (the other "
                            f"choice fits almost as well, margin {100 * r['margin']:.1f} %); check by ear or "
                            "set repeats for this piece")
    pts = _anchor_points(score, anchors)
    nominal = float(score.nominal_duration_s) * float(st.time_scale)
    if span_len > LONG_FACTOR * max(nominal, 1e-9):
        warnings.append(f"the recording{' span' if span_s else ''} ({span_len:.1f} s) is "
                        f"{span_len / nominal:.1f} times the score's nominal length ({nominal:.1f} s); "
                        "the piece was searched for inside it")
    elif span_len < nominal / 3:
        warnings.append(f"the recording ({span_len:.1f} s) is less than a third of the score's nominal "
                        f"length ({nominal:.1f} s); the alignment is likely to be poor")
    report("alignment", 0.0)
    rate = A.rate_hz
    for qn, sec, label in pts:
        if not (span_start <= sec <= A.meta["end_s"]):
            raise InputError(f"anchor {label!r}: {sec:g} s is outside the recording"
                             f"{' span' if span_s else ''} ({span_start:.2f}-{A.meta['end_s']:.2f} s)",
                             path=audio_path)
    weights = StepWeights()

    def first_pass(scale):
        tmk = TimeMap(score.tempo_map.x, scale * score.tempo_map.y, src="score_qn", dst="nominal")
        S = score_features(score, rate_hz=rate, time_scale=scale)
        cells = []
        for qn, sec, _ in pts:
            i = int(round((float(tmk(qn)) - S.start_s) * rate))
            j = int(round((sec - A.start_s) * rate))
            cells.append((min(max(i, 0), S.n_frames - 1), min(max(j, 0), A.n_frames - 1)))
        factors, radii = next(((f, r) for f, r in LEVELS
                               if (S.n_frames / f[0]) * (A.n_frames / f[0]) <= FULL_MAX_CELLS), LEVELS[-1])
        try:
            res = multiscale_dtw(S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset,
                                 onset_weight=ONSET_WEIGHT, factors=factors, radii=radii,
                                 anchors=cells, weights=weights)
        except ValueError as exc:
            raise WorkFailed(f"alignment found no path ({exc}); check the anchors", path=audio_path) from None
        tm1 = path_to_timemap(res["path"], rate_hz=rate, rec_start_s=A.start_s, tempo_map=tmk,
                              score_start_s=S.start_s)
        return tmk, S, res, factors, radii, tm1

    scale = float(st.time_scale)
    tmk, S, res, factors, radii, tm1 = first_pass(scale)
    # the scale again from the first alignment (middle 80 % of the notes): a scale far off makes the
    # path lean on the cheaper one-axis steps, so realign once with the scale found
    q_all = np.unique(score.notes["score_qn"].to_numpy(np.float64))
    if q_all.size > 4:
        qa, qb = np.quantile(q_all, [0.1, 0.9])
        nom_span = float(score.tempo_map(qb) - score.tempo_map(qa))
        rec_span = float(tm1(qb) - tm1(qa))
        if nom_span > 0 and rec_span > 0 and abs(np.log(rec_span / nom_span / scale)) > np.log(RESCALE_ABOVE):
            scale = rec_span / nom_span
            tmk, S, res, factors, radii, tm1 = first_pass(scale)
    # the last bars again where the open end squeezed them (ends.refit_tail)
    n = score.notes
    last_q = float((n["score_qn"] + n["duration_qn"]).max()) if len(n) else 0.0
    end_row = int(round((float(tmk(last_q)) - S.start_s) * rate))
    held = [int(round((float(tmk(q)) - S.start_s) * rate)) for q, _, _ in pts]
    tail = refit_tail(res["path"], S, A, music_end_row=min(end_row, S.n_frames - 1), onset_weight=ONSET_WEIGHT,
                      weights=weights, fixed_rows=held)
    if tail is not None:
        res["path"] = tail
        tm1 = path_to_timemap(tail, rate_hz=rate, rec_start_s=A.start_s, tempo_map=tmk, score_start_s=S.start_s)
        warnings.append("the last bars were squeezed by the first alignment (the performers slowed down or "
                        "held a pause far longer than notated); they were aligned again")
    report("alignment", 0.8)
    path = res["path"]
    costs = path_costs(path, S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset, onset_weight=ONSET_WEIGHT)
    ref = _ref_cost(S, A, ONSET_WEIGHT)
    ratio = float(costs.mean() / max(ref, 1e-9))
    # about 2 Hz, coarser for long inputs so that each of the 12 alignments stays under
    # KEY_MAX_CELLS cells
    key_factor = max(KEY_FACTOR, int(np.ceil(np.sqrt(S.n_frames * A.n_frames / KEY_MAX_CELLS))))
    shifts = key_shift_costs(S.chroma, A.chroma, factor=key_factor, weights=weights)
    key_ratio = float(shifts[0] / max(float(shifts[1:].min()), 1e-9))
    best_shift = int(np.argmin(shifts))
    overall = float(min(ratio_to_confidence(ratio),
                        np.clip((0.95 - key_ratio) / (0.95 - 0.6), 0.0, 1.0)))
    why = []
    if ratio > REFUSE_RATIO:
        why.append(f"path cost ratio {ratio:.2f} > {REFUSE_RATIO:.2f}")
    key_doubt = None
    if KEY_REFUSE_RATIO < key_ratio <= KEY_DOUBT_RATIO and best_shift == 0:
        key_doubt = (f"it matches the score only a little better than in another key (key ratio "
                     f"{key_ratio:.2f}; a reverberant room does that, so does a different piece in the "
                     f"same key): check by ear that it is {score.name}")
        warnings.append(key_doubt)
    elif key_ratio > KEY_REFUSE_RATIO:
        shift_txt = (f"; it matches best transposed by {best_shift if best_shift <= 6 else best_shift - 12:+d} "
                     "semitones" if best_shift else "")
        why.append(f"it matches the score hardly better than in another key (key ratio {key_ratio:.2f} > "
                   f"{KEY_REFUSE_RATIO:.2f}{shift_txt})")
    if why:
        msg = (f"the recording does not match the score {score.name} ({'; '.join(why)}; confidence "
               f"{overall:.2f}): it looks like a different piece")
        if not force:
            raise WorkFailed(msg + "; use --force to write the alignment anyway", path=audio_path)
        warnings.append(msg + "; written anyway (force)")

    inv_tempo = tmk.inverse()
    # second pass on a template warped to the first one, attack and release fitted (refine)
    report("alignment", 0.85)
    try:
        fin = refine(score, A, tm1, anchors=[(q, sec) for q, sec, _ in pts], onset_weight=ONSET_WEIGHT,
                     weights=weights)
    except ValueError:
        fin = None
    if fin is not None:
        S2, path2, place = fin.S, fin.path, fin.place
        tm = path_to_timemap(path2, rate_hz=rate, rec_start_s=A.start_s, tempo_map=place,
                             score_start_s=S2.start_s)
        costs2 = path_costs(path2, S2.chroma, A.chroma, onset_s=S2.onset, onset_r=A.onset,
                            onset_weight=ONSET_WEIGHT)
        ref2 = _ref_cost(S2, A, ONSET_WEIGHT)
        band2 = (fin.lo, fin.hi)
    else:
        S2, path2, place, tm, costs2, ref2 = S, path, tmk, tm1, costs, ref
        band2 = (res["levels"][-1]["lo"], res["levels"][-1]["hi"])
    for r in repeat_rows:
        r["recording_start"] = float(tm(r["score_qn_start"]))
        r["recording_end"] = float(tm(r["score_qn_end"]))
    # local confidence along the score
    ui, lr = local_ratio(path2, costs2, ref_cost=ref2, rate_hz=rate, window_s=LOCAL_WINDOW_S)
    local_qn = np.asarray(place.inverse()(S2.start_s + ui / rate), dtype=np.float64)
    local = pd.DataFrame({"score_qn": local_qn, "ratio": lr, "confidence": ratio_to_confidence(lr)})
    rows1 = (np.asarray(tmk(local_qn), dtype=np.float64) - S.start_s) * rate
    for key, val in _margin_features(fine_S=S2, fine_lo=band2[0], fine_hi=band2[1], fine_rows=ui,
                                     coarse_res=res, coarse_S=S, coarse_rows=np.round(rows1), A=A,
                                     ref=ref2, weights=weights).items():
        local[key] = val

    # flagged regions: one-axis runs with a high local cost, and stretches of high cost
    found = []
    lr_at = dict(zip(ui.tolist(), lr.tolist()))
    rj, rr = recording_cost_ratio(path, costs, ref_cost=ref, rate_hz=rate, window_s=1.0)
    for reg in flag_runs(path, rate_hz=rate, rec_start_s=A.start_s, tempo_map=tmk,
                         min_s=FLAG_MIN_S, score_start_s=S.start_s):
        if reg["kind"] == "insertion":
            # trim the ends of the run that still match (a held chord next to the insertion)
            ja = round((reg["start"] - A.start_s) * rate)
            jb = round((reg["end"] - A.start_s) * rate)
            sel = (rj >= ja) & (rj <= jb)
            bad = rj[sel][rr[sel] >= TRIM_RATIO]
            if bad.size and (bad[-1] - bad[0]) / rate > FLAG_MIN_S:
                reg["start"] = A.start_s + bad[0] / rate
                reg["end"] = A.start_s + bad[-1] / rate
                reg["cost_ratio"] = float(rr[sel][rr[sel] >= TRIM_RATIO].mean())
                reg["duration_s"] = reg["end"] - reg["start"]
                reg["reason"] = (f"{reg['duration_s']:.1f} s of recording ({reg['start']:.2f}-{reg['end']:.2f} s) "
                                 f"match no score near score_qn {reg['score_qn_start']:.2f}: an inserted "
                                 "passage, an interruption or a long pause")
                found.append(reg)
            continue
        sel = (path[:, 1] >= round((reg["start"] - A.start_s) * rate)) & \
              (path[:, 1] <= round((reg["end"] - A.start_s) * rate))
        rows = np.unique(path[sel, 0])
        run_cost = float(np.mean([lr_at.get(int(r), 0.0) for r in rows])) if rows.size else 0.0
        if run_cost >= FLAG_MIN_RATIO or reg["duration_s"] >= FLAG_ALWAYS_S:
            reg["cost_ratio"] = run_cost
            found.append(reg)
    found += mismatch_regions(path, costs, ref_cost=ref, rate_hz=rate, rec_start_s=A.start_s,
                              score_start_s=S.start_s, tempo_map=tmk,
                              min_ratio=MISMATCH_RATIO, min_s=FLAG_MIN_S)
    regions = []
    for reg in merge_regions(found):
        if reg["score_qn_end"] <= 0 or reg["score_qn_start"] >= score.total_qn:
            continue  # within the template's silent lead-in or tail
        for key in ("start", "end", "duration_s", "cost_ratio"):
            reg[key] = float(reg[key])
        regions.append(reg)
        warnings.append(reg["reason"])

    # how far the two passes disagree, and how far the local tempo strays from its surroundings
    local["pass_gap_s"] = np.abs(np.asarray(tm(local_qn)) - np.asarray(tm1(local_qn)))
    local["tempo_dev"] = _tempo_deviation(tm, local_qn, score.tempo_map)

    # the calibrated local confidence (stimkit.align.confidence); nothing inside a flagged region
    # is trusted
    conf_local = local_confidence(local)
    lq = local["score_qn"].to_numpy(np.float64)
    for reg in regions:
        inside = (lq >= reg["score_qn_start"]) & (lq <= reg["score_qn_end"])
        conf_local[inside] = np.minimum(conf_local[inside], FLAGGED_CONFIDENCE)
    local["confidence"] = conf_local

    # where the path is unsure between two sure places, keep the tempo instead of the path
    qn = np.unique(score.notes["score_qn"].to_numpy(np.float64))
    tm, bridged = bridge_unsure(tm, qn, np.interp(qn, local_qn, local["confidence"].to_numpy()),
                                nominal=score.tempo_map, avoid=[(r["score_qn_start"], r["score_qn_end"])
                                                                for r in regions if r["kind"] != "mismatch"])
    if bridged:
        for r in repeat_rows:
            r["recording_start"] = float(tm(r["score_qn_start"]))
            r["recording_end"] = float(tm(r["score_qn_end"]))

    # tables
    loc = score.locate(qn)
    notes = pd.DataFrame({
        "score_qn": qn,
        "measure": loc["measure"].to_numpy(),
        "pass": loc["pass"].to_numpy(),
        "beat": loc["beat"].to_numpy(),
        "nominal": np.asarray(score.tempo_map(qn), dtype=np.float64),
        "recording": np.asarray(tm(qn), dtype=np.float64),
        "confidence": np.interp(qn, local_qn, local["confidence"].to_numpy()),
    })
    notes["confidence"] = neighbourhood_min(notes["recording"].to_numpy(), notes["confidence"].to_numpy())
    unreliable = []
    for sp in unreliable_spans(notes["recording"].to_numpy(), notes["confidence"].to_numpy(), qn):
        where = score.locate([sp["score_qn_start"], sp["score_qn_end"]])
        sp.update({"first_measure": int(where["measure"].iloc[0]), "last_measure": int(where["measure"].iloc[1]),
                   "first_pass": int(where["pass"].iloc[0]), "last_pass": int(where["pass"].iloc[1])})
        unreliable.append(sp)
    if unreliable:
        listed = ", ".join(_span_text(sp) for sp in unreliable[:8]) + (" ..." if len(unreliable) > 8 else "")
        warnings.append(f"the alignment is unreliable in {len(unreliable)} span(s): {listed}; check them by ear "
                        "or give anchors there")
    beats = score.beat_grid()
    beats["recording"] = np.asarray(tm(beats["score_qn"].to_numpy(np.float64)), dtype=np.float64)
    bq = pd.DataFrame({"score_qn": beats["score_qn"], "beat_qn": _beat_qn_of(score, beats["score_qn"])})
    tempo = tempo_curve(tm, bq, window_beats=TEMPO_WINDOW_BEATS)
    rec_start = float(tm(0.0))
    rec_end = float(tm(score.total_qn))
    if span_len > LONG_FACTOR * max(nominal, 1e-9):
        warnings.append(f"piece found at {rec_start:.2f}-{rec_end:.2f} s of the recording")
    settings = {
        "method": "multiscale DTW (Müller et al. 2006; Prätzlich et al. 2016), chroma + DLNCO "
                  "(Ewert et al. 2009)",
        "frame_rate_hz": rate,
        "sample_rate_hz": _chroma.SR,
        "hop_samples": _chroma.HOP,
        "tuning_semitones": float(A.meta.get("tuning_semitones", 0.0)),
        "levels_hz": [rate / f for f in factors],
        "band_radius_frames": list(radii),
        "step_weights": {"diagonal": weights.diag, "score_only": weights.score,
                         "recording_only": weights.rec},
        "onset_weight": ONSET_WEIGHT,
        "open_start_end": True,
        "span_s": None if span_s is None else [float(span_s[0]), float(span_s[1])],
        "anchors": [{"label": l, "score_qn": q, "recording": s} for q, s, l in pts],
        "band_cells_max": int(res["band_cells"]),
        "refuse_ratio": REFUSE_RATIO,
        "key_refuse_ratio": KEY_REFUSE_RATIO,
        "key_doubt_ratio": KEY_DOUBT_RATIO,
        "key_test_rate_hz": rate / key_factor,
        "confidence_ratio_good_bad": [RATIO_GOOD, RATIO_BAD],
        "flag_min_s": FLAG_MIN_S,
        "flag_min_ratio": FLAG_MIN_RATIO,
        "flag_always_s": FLAG_ALWAYS_S,
        "mismatch_ratio": MISMATCH_RATIO,
        "trim_ratio": TRIM_RATIO,
        "tempo_window_beats": TEMPO_WINDOW_BEATS,
        "score_template": "from the notes (harmonic model), lead-in 1 s",
        "repeats": repeats if isinstance(repeats, str) else {str(k): bool(v) for k, v in dict(repeats).items()},
        "time_scale": scale,
        "structure_scan": [[round(a, 4), round(b, 4)] for a, b in st.scan],
        "recording_lead_in_s": HEAD_S if sounding_start else 0.0,
        "bridged_spans": bridged,
        "second_pass": None if fin is None else {
            "template": "warped to the first pass", "band_s": 0.5,
            "attack": fin.attack, "room_wet_decay_s": list(fin.room)},
    }
    # the performed / notated tempo over the middle 80 % of the piece (the ends hold a final
    # ritardando and held chords)
    qa, qb = np.quantile(qn, [0.1, 0.9]) if qn.size > 2 else (qn[0], qn[-1])
    rec_span = float(tm(qb) - tm(qa))
    tempo_ratio = (float(score.tempo_map(qb) - score.tempo_map(qa)) / rec_span if rec_span > 0 and qb > qa
                   else 1.0 / scale)
    confidence = {"overall": overall, "raffel_ellis_ratio": ratio, "key_ratio": key_ratio,
                  "tempo_ratio": tempo_ratio,
                  "best_key_shift": best_shift, "key_doubt": bool(key_doubt),
                  "coarse_ratio": float(res["coarse_cost_ratio"]),
                  "recording_start": rec_start, "recording_end": rec_end}
    report("alignment", 1.0)
    return AlignResult(name=audio_path.stem, score=score, timemap=tm, notes=notes, beats=beats,
                       tempo=tempo, confidence=confidence, regions=regions,
                       warnings=warnings,
                       settings=settings, local=local, audio_path=audio_path, repeats=repeat_rows,
                       unreliable=unreliable)


def _check_room(score, audio_path: Path, span_s) -> None:
    """Refuse (:class:`WorkFailed`) a recording or span that could hold less than
    :data:`MIN_SHARE_HELD` of the score even at the fastest tempo the fit tries -- before any
    feature or template is computed (the length comes from the file's header)."""
    from ..audio.read import audio_info

    total = float(audio_info(audio_path).duration_s)
    lo, hi = (0.0, total) if span_s is None else (max(float(span_s[0]), 0.0), min(float(span_s[1]), total))
    span_len = max(hi - lo, 0.0)
    nominal = float(score.nominal_duration_s)
    if MIN_AUDIO_S <= span_len < MIN_SHARE_HELD * SCALE_MIN * nominal:  # (too short: said below)
        raise WorkFailed(f"the recording{' span' if span_s else ''} lasts {span_len:.1f} s, but the score "
                         f"{score.name} lasts about {nominal:,.0f} s at its notated tempo: even three times "
                         f"as fast the recording could hold less than a tenth of it; check that this is the "
                         f"right score and recording", path=audio_path)


def align_files(score_path, audio_path, *, anchors=(), force: bool = False, repeats="auto",
                progress=None) -> AlignResult:
    """Load ``score_path`` (:func:`stimkit.score.parse.load_score`) and :func:`align_score` it
    (``repeats``: ``"auto"``, ``"all"``, ``"none"``, ``"printed"`` or a mapping, as there)."""
    from ..score.parse import load_score

    score = load_score(score_path, expand_repeats=repeats != "printed")
    return align_score(score, audio_path, anchors=anchors, force=force, repeats=repeats, progress=progress)


def confidence_at(result: AlignResult, score_qn) -> np.ndarray:
    """Alignment confidence (0..1, the probability of being within 100 ms) at ``score_qn``
    positions: the note positions' values (:mod:`stimkit.align.confidence`), interpolated."""
    q = np.asarray(score_qn, dtype=np.float64)
    n = result.notes
    return np.interp(q, n["score_qn"].to_numpy(np.float64), n["confidence"].to_numpy(np.float64))


def _json_payload(result: AlignResult) -> dict:
    t = result.tempo
    return {
        "score": str(result.score.path),
        "recording": None if result.audio_path is None else str(result.audio_path),
        "time_conventions": {
            "score_qn": "quarter notes from the start of the score as performed",
            "nominal": "seconds at the notated tempo",
            "recording": "seconds from the first sample of the recording file",
            "frames": "a frame's time is its window centre",
        },
        "confidence": result.confidence,
        "repeats": result.repeats,
        "unreliable_spans": result.unreliable,
        "flagged_regions": result.regions,
        "tempo": {"score_qn": t["score_qn"].to_numpy(), "recording": t["recording"].to_numpy(),
                  "bpm": t["bpm"].to_numpy(), "quarter_bpm": t["quarter_bpm"].to_numpy(),
                  "window_beats": TEMPO_WINDOW_BEATS,
                  "bpm_unit": "beats of the bar's beat unit per minute; quarter_bpm: quarter notes per minute"},
        "columns": {
            "score_qn": "quarter notes from the start, as performed",
            "measure": "bar number as printed", "pass": "1 first time, 2 repeat, ...",
            "beat": "1-based beat in the bar's beat unit",
            "nominal": "seconds at the notated tempo", "recording": "seconds in the recording",
            "confidence": "local alignment confidence 0..1",
        },
        "settings": result.settings,
        "warnings": result.warnings,
    }


def write_alignment(result: AlignResult, *, out_dir) -> list[Path]:
    """Write ``<name>.alignment.tsv`` (one row per distinct onset) and ``<name>.alignment.json``.

    ``<name>`` is the recording's file stem. Both files appear together or not at all.
    """
    from ..export.tables import OutputSet, check_output_dir

    out = check_output_dir(out_dir, create=False)  # the set makes the folder (none on failure)
    table = result.notes[NOTE_TABLE_COLUMNS]
    with OutputSet(out) as outs:
        outs.write_tsv(f"{result.name}.alignment.tsv", table,
                       column_formats={"beat": "%.4f", "confidence": "%.3f"})
        outs.write_json(f"{result.name}.alignment.json", _json_payload(result))
    return list(outs.committed)


def doubts(result: AlignResult) -> list[str]:
    """What makes an alignment doubtful, one short text each: unreliable spans and repeat
    decisions that could go either way (empty when nothing is doubtful)."""
    out = [f"unreliable at {_span_text(sp)}" for sp in result.unreliable]
    out += [f"{r['label']}: {'taken' if r['taken'] else 'left out'} is doubtful" for r in result.repeats
            if r.get("doubtful")]
    if result.confidence.get("key_doubt"):
        out.append("it may be a different piece in the same key")
    return out


def check_strict(result: AlignResult, *, piece: str | None = None) -> None:
    """Raise :class:`WorkFailed` naming what is doubtful (``--strict``)."""
    d = doubts(result)
    if d:
        who = f"piece '{piece}'" if piece else result.name
        raise WorkFailed(f"{who}: the alignment is doubtful ({'; '.join(d)}); nothing was written "
                         "(--strict). Check by ear, add anchors or set the repeats, or run without --strict")


def summary_lines(result: AlignResult) -> list[str]:
    """A few lines describing the alignment."""
    c = result.confidence
    n = len(result.notes)
    lines = [
        f"{result.name}: {n} onset positions aligned, recording {c['recording_start']:.2f}-"
        f"{c['recording_end']:.2f} s",
        f"confidence {c['overall']:.2f} (path cost ratio {c['raffel_ellis_ratio']:.2f})",
    ]
    from ..timeline.run import repeats_line

    line = repeats_line(result.name, result.repeats, float(c.get("tempo_ratio", 1.0)))
    if line:
        lines.append(line.strip())
    for r in result.regions:
        lines.append(f"flagged {r['kind']} at {r['start']:.1f}-{r['end']:.1f} s")
    for w in result.warnings:
        if not any(w == r["reason"] for r in result.regions):
            lines.append(f"warning: {w}")
    return lines
