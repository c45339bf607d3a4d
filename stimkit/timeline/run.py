"""The main job: a validated session in, the hand-off files out.

What it does, in order
----------------------
1. Reads every score (:func:`stimkit.score.parse.load_score`) and describes the recording.
2. Clock: detects the sync marks and fits ``recording -> onset`` (:mod:`.clock`), or takes the
   stated offset, or keeps ``onset`` = ``recording``.
3. Finds every piece inside the recording (:mod:`.segment`) and aligns each on its own span
   (:func:`stimkit.align.run.align_score`).
4. Measures the recording (:func:`stimkit.audio.pipeline.compute_features`) and finds change
   points in the features (:func:`stimkit.stats.changes.change_points`).
5. Builds the event table (:mod:`.events`), the beat grid and the alignment's tempo beside the
   features, and hands everything to :func:`.handoff.write_handoff`, which writes all files
   or none.

Steps 1, 3 and 4 depend only on the recording and the scores: :func:`analyse_recording` does
them alone, so sessions that share one recording (several participants hearing one
performance, each on their own recorder clock) compute them once and pass the result to
:func:`annotate` (``analysis=``), which then runs steps 2 and 5 only. The clock is fitted first
either way, so a sync problem is reported before the long steps.

Conventions
-----------
Kinds of time as in DESIGN.md. Step timings go to ``provenance.json`` (the only part of the
outputs that changes between reruns).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..audio.rhythm import match_octave
from ..errors import InputError, WorkFailed
from . import events as ev
from .clock import ClockFit, detect_sync_marks, fit_clock, identity_clock, offset_clock, pair_marks, \
    read_recorder_times
from .handoff import ALIGNED_TEMPO, HandoffData, check_outputs_against_inputs, output_base, write_handoff

__all__ = ["AnnotateResult", "RecordingAnalysis", "analyse_recording", "annotate", "summary_lines",
           "output_base"]

#: Seconds of recording kept on each side of a located piece for its alignment.
SPAN_PAD_S = 8.0
#: Confidence below which a region of a piece is shaded in the report.
LOW_CONFIDENCE = 0.5


@dataclass
class PieceResult:
    name: str
    score_path: Path
    start_recording_s: float
    end_recording_s: float
    start_onset_s: float
    end_onset_s: float
    n_boundaries: int
    median_confidence: float
    locate_cost: float
    repeats: list = field(default_factory=list)     # AlignResult.repeats
    doubts: list = field(default_factory=list)      # align.run.doubts: unreliable spans, doubtful repeats
    tempo_ratio: float = 1.0                         # performed / notated tempo, whole piece


@dataclass
class AnnotateResult:
    """What one run produced: the files, the tables and the numbers the summary shows."""

    out_dir: Path
    base: str
    written: list[Path]
    pieces: list[PieceResult]
    clock: ClockFit
    events: pd.DataFrame
    beats: pd.DataFrame
    warnings: list[str] = field(default_factory=list)
    timings_s: dict = field(default_factory=dict)
    physio: list = field(default_factory=list)  # stimkit.physio.RelateResult per [[physio]]


# ---------------------------------------------------------------------------------------------
def _clock(session, *, duration_s: float, progress) -> tuple[ClockFit, np.ndarray, list[str]]:
    sy = session.sync
    if sy.mode == "none":
        return identity_clock(), np.zeros(0), []
    if sy.mode == "offset":
        return offset_clock(sy.offset_s), np.zeros(0), []
    where = session.source or session.recording
    if sy.recorder_s is not None:
        recorder = np.asarray(sy.recorder_s, dtype=np.float64)
    else:
        recorder = read_recorder_times(sy.recorder_file, column=sy.recorder_column)
    if np.any(np.diff(recorder) <= 0):
        raise InputError("the recorder sync times must increase (one per mark, in order)",
                         path=sy.recorder_file or where)
    marks = detect_sync_marks(session.recording, frequency_hz=sy.frequency_hz, duration_s=sy.duration_s,
                              kind=sy.kind, start_s=sy.search_start_s, end_s=sy.search_end_s, progress=progress)
    found = np.array([m.recording_s for m in marks])
    if found.size == 0:
        raise WorkFailed(f"no sync mark at {sy.frequency_hz:g} Hz ({sy.duration_s * 1000:g} ms) was found "
                         f"in {session.recording}; check [sync] frequency_hz and duration_s, or give "
                         f"offset_s instead")
    try:
        got, missing = pair_marks(found, recorder)
    except WorkFailed as exc:  # name the file whose times could not be paired
        raise WorkFailed(str(exc), path=sy.recorder_file or where) from None
    if missing:
        shown = ", ".join(f"{recorder[i]:.3f} s" for i in missing[:5])
        raise WorkFailed(f"{len(missing)} of {recorder.size} sync marks could not be found in "
                         f"{session.recording} (recorder times {shown}); {found.size} mark(s) detected "
                         f"at {', '.join(f'{t:.3f}' for t in found[:8])} s recording time; check the "
                         f"recorder times, frequency_hz / duration_s, or narrow search_start_s/search_end_s")
    warnings = []
    if found.size > recorder.size:
        warnings.append(f"{found.size - recorder.size} detected sync-like sound(s) did not fit the "
                        f"recorder's spacing and were ignored")
    fit = fit_clock(got, recorder)
    return fit, got, warnings + list(fit.warnings)


def _stopwatch(timings: dict, progress=None):
    """``lap(name)``: add the seconds since the previous lap to ``timings[name]`` (``None``: skip)
    and tell ``progress(name, 1.0)`` that the stage finished (a piped CLI prints one line each)."""
    last = [time.perf_counter()]

    def lap(name):
        now = time.perf_counter()
        if name is not None:
            timings[name] = timings.get(name, 0.0) + now - last[0]
            if progress is not None:
                progress(name, 1.0)
        last[0] = now

    return lap


def _timemap_call(tm):
    return lambda q: tm(np.asarray(q, dtype=np.float64))


def _doubts(result) -> list[str]:
    from ..align.run import doubts

    return doubts(result)


def _confidence_fn(result):
    from ..align.run import confidence_at

    return lambda q: confidence_at(result, np.asarray(q, dtype=np.float64))


def _regions(result) -> list[tuple[float, float, str]]:
    """Low-confidence regions of an alignment as ``(start, end, reason)`` recording seconds: its
    flagged regions and the stretches where its local confidence is below :data:`LOW_CONFIDENCE`."""
    out = [(float(r["start"]), float(r["end"]), str(r.get("reason") or r.get("kind") or ""))
           for r in result.regions]
    for sp in getattr(result, "unreliable", []) or []:
        bars = (f"bar {sp['first_measure']}" if sp["first_measure"] == sp["last_measure"]
                else f"bars {sp['first_measure']}-{sp['last_measure']}")
        out.append((float(sp["start"]), float(max(sp["end"], sp["start"] + 0.1)),
                    f"alignment unsure at {bars} (confidence down to {sp['min_confidence']:.2f})"))
    out = [(s, e, why) for s, e, why in out if math.isfinite(s) and math.isfinite(e) and e > s]
    return sorted(out)


def _silences(features) -> pd.DataFrame:
    """Silence segments ``start_s, end_s`` (recording seconds) from the audio stage."""
    arr = np.asarray(features.summary["silence_segments"], dtype=np.float64).reshape(-1, 2)
    return pd.DataFrame({"start_s": arr[:, 0], "end_s": arr[:, 1]})


def _aligned_tempo(times_s: np.ndarray, aligned, pieces) -> np.ndarray:
    """Tempo of the performance from each piece's alignment (beats per minute in the bar's beat
    unit, Hann-smoothed over a few beats by the alignment stage) at ``times_s`` (recording
    seconds); NaN outside the pieces."""
    out = np.full(times_s.size, np.nan)
    for res, p in zip(aligned, pieces):
        t = res.tempo
        if len(t) < 2:
            continue
        r = t["recording"].to_numpy(dtype=np.float64)
        b = t["bpm"].to_numpy(dtype=np.float64)
        ok = np.isfinite(r) & np.isfinite(b)
        if ok.sum() < 2:
            continue
        inside = (times_s >= p.start_recording_s) & (times_s <= p.end_recording_s)
        out[inside] = np.interp(times_s[inside], r[ok], b[ok])
    return out


def _read_physio(session) -> list:
    """(spec, participant label, BeatSeries) for every ``[[physio]]`` of the session."""
    if not getattr(session, "physio", None):
        return []
    from ..physio.inputs import participant_label, read_series

    return [(spec, spec.participant or participant_label(spec.file), read_series(spec)) for spec in session.physio]


def _relate_physio(session, events, physio_in, *, progress=None) -> list:
    """:func:`stimkit.physio.relate` per physiological series of the session (seed from
    ``[relate] seed``, one child per series in the order listed)."""
    if not physio_in:
        return []
    from ..physio.inputs import settings_from_options
    from ..physio.relate import relate, root_seed

    opts = getattr(session, "relate", {}) or {}
    settings = settings_from_options(opts)
    kids = root_seed(int(opts.get("seed", 0))).spawn(len(physio_in))
    return [relate(events, None, series, settings=settings, seed=kid, participant=label, progress=progress)
            for (spec, label, series), kid in zip(physio_in, kids)]


@dataclass
class RecordingAnalysis:
    """What the chain learns from the recording and the scores alone, before any clock: the
    parsed scores, where each piece is, its alignment, the features and their change points (all
    in ``recording`` seconds). Several sessions that share one recording (participants who heard
    the same performance) can share one analysis (:func:`analyse_recording`)."""

    duration_s: float
    scores: list
    spans: list
    aligned: list
    features: object                 # stimkit.audio.pipeline.FeatureResult
    changes: pd.DataFrame | None
    score_warnings: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    timings_s: dict = field(default_factory=dict)


def analyse_recording(session, *, progress=None) -> RecordingAnalysis:
    """Steps 1, 3 and 4 of the chain (see module notes): scores, pieces, alignment, features
    and change points of ``session.recording``; the session's sync is not used.

    Raises
    ------
    InputError
        A score or the recording cannot be read (exit 2).
    WorkFailed
        A piece cannot be found or an alignment is refused (exit 1).
    """
    from ..audio.read import audio_info
    from ..score.parse import load_score

    timings: dict[str, float] = {}
    lap = _stopwatch(timings, progress)

    info = audio_info(session.recording)
    duration_s = info.duration_s
    scores, score_warnings, warnings = [], [], []
    for p in session.pieces:
        sc = load_score(p.score, expand_repeats=session.expand_repeats)
        scores.append(sc)
        score_warnings.extend(f"{p.name}: {w}" for w in sc.warnings)
    lap("scores")

    # pieces
    from .segment import find_pieces

    names = [p.name for p in session.pieces]
    spans = find_pieces(scores, names, session.recording, rough_starts=[p.start_s for p in session.pieces],
                        duration_s=duration_s, progress=progress)
    lap("pieces")

    from ..align.run import align_score, check_strict

    aligned = []
    for k, (p, sc, sp) in enumerate(zip(session.pieces, scores, spans)):
        prev_end = spans[k - 1].end_s if k else 0.0
        next_start = spans[k + 1].start_s if k + 1 < len(spans) else duration_s
        lo = max(prev_end, sp.start_s - SPAN_PAD_S, 0.0)
        hi = min(next_start, sp.end_s + SPAN_PAD_S, duration_s)
        try:
            res = align_score(sc, session.recording, anchors=list(p.anchors), force=session.force,
                              span_s=(lo, hi), repeats=session.repeats_of(p), progress=progress)
        except WorkFailed as exc:
            raise WorkFailed(f"piece '{p.name}' ({lo:.1f}-{hi:.1f} s of the recording): {exc}") from None
        if getattr(session, "strict", False):
            check_strict(res, piece=p.name)
        aligned.append(res)
        warnings.extend(f"{p.name}: {w}" for w in res.warnings)
    lap("alignment")

    from ..audio.pipeline import compute_features

    feats = compute_features(session.recording, rate_hz=session.rate_hz, progress=progress)
    lap("features")

    from ..stats.changes import change_points

    piece_spans = pd.DataFrame({"start": [s.start_s for s in spans], "end": [s.end_s for s in spans]})
    try:
        changes = change_points(feats.frame.select_dtypes("number"), spans=piece_spans)
    except WorkFailed as exc:
        warnings.append(f"feature change points skipped: {exc}")
        changes = None
    lap("change points")
    return RecordingAnalysis(duration_s=duration_s, scores=scores, spans=spans, aligned=aligned,
                             features=feats, changes=changes, score_warnings=score_warnings,
                             warnings=warnings, timings_s=timings)


def annotate(session, *, progress=None, command: list[str] | None = None,
             analysis: RecordingAnalysis | None = None, paths_relative_to=None,
             keep_timings: bool = True) -> AnnotateResult:
    """Run the main job on a validated :class:`~stimkit.session.Session` (see module notes).

    ``analysis``, when given, is :func:`analyse_recording`'s result for this session's recording
    and pieces (computed once for several sessions that share the recording); the chain then
    only fits the clock and writes the hand-off. ``paths_relative_to`` is the folder the paths in
    ``provenance.json`` and the report are written relative to (default: the session file's
    folder, else the current folder); ``keep_timings=False``
    leaves the step timings out of ``provenance.json``, so reruns give identical bytes.

    Raises
    ------
    InputError
        A score or the recording cannot be read (exit 2).
    WorkFailed
        A sync mark or a piece cannot be found, or an alignment is refused (exit 1).
    """
    from ..audio.read import audio_info
    from ..export.tables import check_output_dir
    from .segment import MAX_RATIO

    check_outputs_against_inputs(session)  # never write over an input (before any work)
    # the output folder is checked, not yet created: the writing creates it, so a run refused
    # before then leaves no empty folder behind
    out_dir = check_output_dir(session.out_dir, create=False)
    timings: dict[str, float] = {}
    lap = _stopwatch(timings, progress)

    # the clock first: a sync problem is found before the long steps
    duration_s = audio_info(session.recording).duration_s if analysis is None else analysis.duration_s
    clock, mark_times, sync_warnings = _clock(session, duration_s=duration_s, progress=progress)
    lap("sync")
    physio_in = _read_physio(session)  # bad physiological files stop the run before the work
    lap("physio")
    if analysis is None:
        analysis = analyse_recording(session, progress=progress)
        lap(None)  # restart the watch: the analysis timed its own steps
    timings.update(analysis.timings_s)
    warnings: list[str] = list(analysis.score_warnings) + sync_warnings + list(analysis.warnings)
    spans, aligned, feats, changes = analysis.spans, analysis.aligned, analysis.features, analysis.changes
    frame = feats.frame

    # events
    tables = []
    beats = []
    pieces_out: list[PieceResult] = []
    low_conf: list[tuple[float, float, str]] = []
    for p, sp, res in zip(session.pieces, spans, aligned):
        sc = res.score       # the score in the order performed (repeats as decided)
        to_rec = _timemap_call(res.timemap)
        conf = _confidence_fn(res)
        t = ev.piece_events(sc, piece=p.name, to_recording=to_rec, clock=clock, confidence=conf)
        tables.append(t)
        tables.append(ev.repeat_events(res.repeats, sc, piece=p.name, to_recording=to_rec, clock=clock))
        beats.append(ev.beat_table(sc, piece=p.name, to_recording=to_rec, clock=clock))
        row = t.iloc[0]
        low_conf.extend(_regions(res))
        med = float(np.nanmedian(conf(np.unique(sc.notes["score_qn"].to_numpy(dtype=np.float64)))))
        pieces_out.append(PieceResult(
            name=p.name, score_path=p.score, start_recording_s=float(row["recording"]),
            end_recording_s=float(row["recording"]) + float(row["duration"]) / clock.slope,
            start_onset_s=float(row["onset"]), end_onset_s=float(row["onset"] + row["duration"]),
            n_boundaries=int(len(t) - 1), median_confidence=med, locate_cost=sp.cost,
            repeats=list(res.repeats), tempo_ratio=float(res.confidence.get("tempo_ratio", 1.0)),
            doubts=_doubts(res)))
    tables.append(ev.silence_events(_silences(feats), clock=clock, min_duration_s=0.0))
    tables.append(ev.sync_events(mark_times, clock=clock))
    if changes is not None and len(changes):
        ch = changes.rename(columns={"features": "label"}) if "features" in changes.columns else changes
        tables.append(ev.change_events(ch, clock=clock))
    events = ev.merge_events(tables)
    frame = frame.copy()
    frame[ALIGNED_TEMPO] = _aligned_tempo(np.asarray(frame.index, dtype=np.float64), aligned, pieces_out)
    # inside the pieces the audio tempo takes the metrical level of the alignment's tempo
    frame["tempo_bpm"] = match_octave(frame["tempo_bpm"].to_numpy(np.float64), frame[ALIGNED_TEMPO].to_numpy())
    units = dict(feats.units)
    units[ALIGNED_TEMPO] = "BPM"
    descriptions = dict(feats.descriptions)
    descriptions["tempo_bpm"] += (" Inside the aligned pieces it is moved to the metrical level (x1/3, 1/2, "
                                  "2/3, 3/2, 2 or 3) closest to aligned_tempo_bpm.")
    descriptions[ALIGNED_TEMPO] = ("Tempo of the performance from the score alignment: beats per minute in "
                                   "the bar's beat unit, smoothed over a few beats; n/a outside the pieces.")
    beat_df = pd.concat(beats, ignore_index=True) if beats else pd.DataFrame()
    lap("events")
    physio_results = _relate_physio(session, events, physio_in, progress=progress)
    for r in physio_results:
        warnings.extend(r.warnings)
    lap("physio")

    written = write_handoff(HandoffData(
        session=session, out_dir=out_dir, duration_s=duration_s, clock=clock, events=events,
        beats=beat_df, frame=frame, units=units, descriptions=descriptions, pieces=pieces_out,
        spans=spans, low_confidence=low_conf, changes=changes, warnings=warnings, timings=timings,
        settings={"span_pad_s": SPAN_PAD_S, "piece_search_max_ratio": MAX_RATIO,
                  "low_confidence_below": LOW_CONFIDENCE},
        base_dir=paths_relative_to, keep_timings=keep_timings,
        physio=physio_results, physio_inputs={label: spec.file for spec, label, _ in physio_in}),
        command=command, lap=lap)
    base = output_base(session)
    return AnnotateResult(out_dir=out_dir, base=base, written=[Path(w) for w in written], pieces=pieces_out,
                          clock=clock, events=events, beats=beat_df, warnings=warnings, timings_s=timings,
                          physio=physio_results)


def _relative(p: Path, folder: Path) -> str:
    try:
        return Path(p).relative_to(folder).as_posix()
    except ValueError:
        return str(p)


def repeats_line(name: str, repeats: list, tempo_ratio: float = 1.0) -> str:
    """One line saying which repeats a piece's performance took (and a tempo far from the marks)."""
    parts = []
    if repeats:
        taken = [r.get("short", r["label"]) for r in repeats if r["taken"]]
        skipped = [r.get("short", r["label"]) for r in repeats if not r["taken"]]
        how = sorted({r.get("decided", "recording") for r in repeats})
        parts.append(f"repeats taken: {', '.join(taken) or 'none'}; skipped: {', '.join(skipped) or 'none'} "
                     f"(decided by the {' and '.join(how)})")
        doubt = [r.get("short", r["label"]) for r in repeats if r.get("doubtful")]
        if doubt:
            parts.append(f"DOUBTFUL: {', '.join(doubt)}")
    if np.isfinite(tempo_ratio) and abs(np.log(tempo_ratio)) > np.log(1.3):
        parts.append(f"played at about {tempo_ratio:.2f} times the notated tempo")
    return f"  {name}: " + "; ".join(parts) if parts else ""


def summary_lines(result: AnnotateResult) -> list[str]:
    """Short lines for people: pieces, boundaries, confidence, clock, outputs."""
    lines = []
    kind = "recording time" if result.clock.method == "none" else "recorder clock"
    for p in result.pieces:
        lines.append(f"piece {p.name}: {p.start_onset_s:.3f} s to {p.end_onset_s:.3f} s {kind} "
                     f"({p.n_boundaries} boundaries, median confidence {p.median_confidence:.2f})")
        line = repeats_line(p.name, p.repeats, p.tempo_ratio)
        if line:
            lines.append(line)
        if p.doubts:
            lines.append(f"  {p.name}: CHECK BY EAR: " + "; ".join(p.doubts))
    n_b = sum(p.n_boundaries for p in result.pieces)
    med = float(np.nanmedian([p.median_confidence for p in result.pieces])) if result.pieces else float("nan")
    lines.append(f"{len(result.pieces)} piece(s) found, {n_b} boundaries placed, median confidence {med:.2f}")
    c = result.clock
    if c.method == "marks":
        res = ("residuals zero by construction (two marks fix offset and drift exactly)"
               if c.recording_s.size == 2 else f"largest residual {c.max_residual_s * 1000:.2f} ms")
        lines.append(f"clock: {c.recording_s.size} sync marks, offset {c.offset_s:.4f} s, drift "
                     f"{c.drift_ppm:+.2f} ppm, {res}")
    elif c.method == "offset":
        lines.append(f"clock: stated offset {c.offset_s:.4f} s, no drift")
    else:
        lines.append("clock: no sync given; onset = recording time")
    if result.physio:
        from ..physio.summary import series_lines

        for r in result.physio:
            lines.extend(series_lines(r))
    if result.warnings:
        lines.append(f"{len(result.warnings)} warning(s), listed in the report and the provenance file")
    lines.append(f"outputs in {result.out_dir}:")
    lines.extend(f"  {_relative(p, result.out_dir)}" for p in sorted(result.written, key=lambda q: str(q)))
    return lines
