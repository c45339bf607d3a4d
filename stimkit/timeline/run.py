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
5. Builds the event table (:mod:`.events`) and the beat grid, and writes, through one
   :class:`~stimkit.export.tables.OutputSet` (all files or none): ``<base>_events.tsv/.json``,
   ``<base>_stim.tsv.gz/.json``, ``<base>_beats.tsv/.json``, ``dataset_description.json``,
   ``provenance.json``, ``report.html`` and ``report.png``.

Conventions
-----------
- ``<base>`` is the BIDS name from the session's entities (``sub-01_ses-1_task-music_run-1``),
  or the recording's file name when none are given.
- The continuous file is on the recorder clock: its rows are at ``StartTime + k /
  SamplingFrequency`` with ``StartTime = onset(t0)`` and ``SamplingFrequency = rate_hz / slope``
  (the feature frames are evenly spaced on the recording clock, so on the recorder clock their
  spacing is stretched by the clock slope). Each row is the feature of one window, at the
  window's centre.
- Timings of the steps are the only part of ``provenance.json`` that changes between reruns.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, WorkFailed
from . import events as ev
from .clock import ClockFit, detect_sync_marks, fit_clock, identity_clock, offset_clock, pair_marks, \
    read_recorder_times

__all__ = ["AnnotateResult", "annotate", "summary_lines", "output_base"]

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


def output_base(session) -> str:
    from ..export.bids import bids_name

    fallback = Path(session.recording).name.split(".")[0] or "stimkit"
    return bids_name(subject=session.bids.get("subject"), session=session.bids.get("session"),
                     task=session.bids.get("task"), run=session.bids.get("run"), fallback=fallback)


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
    got, missing = pair_marks(found, recorder)
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


def _defaults(fn, names) -> dict:
    import inspect

    sig = inspect.signature(fn)
    return {n: sig.parameters[n].default for n in names if n in sig.parameters}


def _timemap_call(tm):
    return lambda q: tm(np.asarray(q, dtype=np.float64))


def _confidence_fn(result):
    try:
        from ..align.run import confidence_at
    except ImportError:
        return None
    return lambda q: np.asarray(confidence_at(result, np.asarray(q, dtype=np.float64)), dtype=np.float64)


def _regions(result) -> list[tuple[float, float]]:
    """Low-confidence regions of an alignment as ``(start, end)`` recording seconds."""
    reg = getattr(result, "regions", None)
    out = []
    if reg is None:
        return out
    if isinstance(reg, pd.DataFrame):
        cols = [c for c in ("start_recording", "start_s", "start", "recording_start") if c in reg.columns]
        cole = [c for c in ("end_recording", "end_s", "end", "recording_end") if c in reg.columns]
        if cols and cole:
            out = list(zip(reg[cols[0]].astype(float), reg[cole[0]].astype(float)))
    else:
        for r in reg:
            if isinstance(r, dict):
                s = r.get("start_recording", r.get("start_s", r.get("start")))
                e = r.get("end_recording", r.get("end_s", r.get("end")))
            elif isinstance(r, (tuple, list)) and len(r) >= 2:
                s, e = r[0], r[1]
            else:
                s = getattr(r, "start_s", getattr(r, "start", None))
                e = getattr(r, "end_s", getattr(r, "end", None))
            if s is not None and e is not None:
                out.append((float(s), float(e)))
    loc = getattr(result, "local", None)
    if isinstance(loc, pd.DataFrame) and len(loc) and {"score_qn", "confidence"} <= set(loc.columns):
        q = loc["score_qn"].to_numpy(dtype=np.float64)
        low = loc["confidence"].to_numpy(dtype=np.float64) < LOW_CONFIDENCE
        edges = np.diff(np.r_[0, low.astype(int), 0])
        for a, b in zip(np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1):
            r = np.atleast_1d(result.timemap(np.array([q[a], q[b]])))
            out.append((float(r[0]), float(max(r[1], r[0] + 0.1))))
    out = [(s, e) for s, e in out if math.isfinite(s) and math.isfinite(e) and e > s]
    return sorted(out)


def _silences(features) -> pd.DataFrame:
    """Silence segments ``start_s, end_s`` (recording seconds) from the audio stage."""
    segs = (getattr(features, "summary", None) or {}).get("silence_segments")
    if segs is not None:
        arr = np.asarray(segs, dtype=np.float64).reshape(-1, 2)
        return pd.DataFrame({"start_s": arr[:, 0], "end_s": arr[:, 1]})
    seg = getattr(features, "silences", None)
    if seg is None:
        seg = getattr(features, "silence", None)
    if isinstance(seg, pd.DataFrame) and {"start_s", "end_s"} <= set(seg.columns):
        return seg[["start_s", "end_s"]]
    if isinstance(seg, pd.DataFrame) and {"start", "end"} <= set(seg.columns):
        return seg.rename(columns={"start": "start_s", "end": "end_s"})[["start_s", "end_s"]]
    frame = features.frame
    col = next((c for c in ("silence", "is_silence", "silent") if c in frame.columns), None)
    if col is None:
        return pd.DataFrame({"start_s": [], "end_s": []})
    flag = frame[col].to_numpy().astype(bool)
    t = np.asarray(frame.index, dtype=np.float64)
    if t.size < 2:
        return pd.DataFrame({"start_s": [], "end_s": []})
    hop = float(np.median(np.diff(t)))
    edges = np.diff(np.r_[0, flag.astype(int), 0])
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    return pd.DataFrame({"start_s": t[starts] - hop / 2, "end_s": t[ends - 1] + hop / 2})


def _envelope(path, *, t_map, columns: int = 2400):
    """Waveform min/max per display column, streamed; times on the figure's clock."""
    from ..audio.read import audio_info, iter_blocks

    info = audio_info(path)
    per = max(int(math.ceil(info.frames / columns)), 1)
    lo, hi = [], []
    rest = np.zeros(0)
    for _, x in iter_blocks(path, block_s=max(per / info.sample_rate_hz * 200, 10.0), mono=True,
                            dtype="float32"):
        x = np.concatenate([rest, x])
        n = x.size // per * per
        if n:
            blk = x[:n].reshape(-1, per)
            lo.append(blk.min(axis=1))
            hi.append(blk.max(axis=1))
        rest = x[n:]
    if rest.size:
        lo.append(np.array([rest.min()]))
        hi.append(np.array([rest.max()]))
    lo_a = np.concatenate(lo) if lo else np.zeros(0)
    hi_a = np.concatenate(hi) if hi else np.zeros(0)
    t = (np.arange(lo_a.size) + 0.5) * per / info.sample_rate_hz
    return np.asarray(t_map(t), dtype=np.float64), lo_a, hi_a


ALIGNED_TEMPO = "aligned_tempo_bpm"


def _aligned_tempo(times_s: np.ndarray, aligned, pieces) -> np.ndarray:
    """Tempo of the performance from each piece's alignment (beats per minute in the bar's beat
    unit, Hann-smoothed over a few beats by the alignment stage) at ``times_s`` (recording
    seconds); NaN outside the pieces."""
    out = np.full(times_s.size, np.nan)
    for res, p in zip(aligned, pieces):
        t = getattr(res, "tempo", None)
        if not isinstance(t, pd.DataFrame) or len(t) < 2 or not {"recording", "bpm"} <= set(t.columns):
            continue
        r = t["recording"].to_numpy(dtype=np.float64)
        b = t["bpm"].to_numpy(dtype=np.float64)
        ok = np.isfinite(r) & np.isfinite(b)
        if ok.sum() < 2:
            continue
        inside = (times_s >= p.start_recording_s) & (times_s <= p.end_recording_s)
        out[inside] = np.interp(times_s[inside], r[ok], b[ok])
    return out


def _stim_frame(frame: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Numeric columns only (booleans as 0/1), so any numeric loader reads the file; returns the
    frame and the names of the text columns left out."""
    out = frame.copy()
    dropped = []
    for c in list(out.columns):
        if out[c].dtype == bool:
            out[c] = out[c].astype(np.int64)
        elif out[c].dtype.kind not in "iuf":
            dropped.append(str(c))
            out = out.drop(columns=c)
    return out, dropped


# ---------------------------------------------------------------------------------------------
def annotate(session, *, progress=None, command: list[str] | None = None) -> AnnotateResult:
    """Run the main job on a validated :class:`~stimkit.session.Session` (see module notes).

    Raises
    ------
    InputError
        A score or the recording cannot be read (exit 2).
    WorkFailed
        A sync mark or a piece cannot be found, or an alignment is refused (exit 1).
    """
    from ..audio.read import audio_info
    from ..export.tables import check_output_dir
    from ..score.parse import load_score

    timings: dict[str, float] = {}
    warnings: list[str] = []
    clock0 = time.perf_counter()

    def lap(name):
        nonlocal clock0
        now = time.perf_counter()
        timings[name] = timings.get(name, 0.0) + now - clock0
        clock0 = now

    out_dir = check_output_dir(session.out_dir)
    info = audio_info(session.recording)
    duration_s = info.duration_s
    scores = []
    for p in session.pieces:
        sc = load_score(p.score, expand_repeats=session.expand_repeats)
        scores.append(sc)
        warnings.extend(f"{p.name}: {w}" for w in sc.warnings)
    lap("scores")

    clock, mark_times, w = _clock(session, duration_s=duration_s, progress=progress)
    warnings.extend(w)
    lap("sync")

    # pieces
    from .segment import MAX_RATIO, find_pieces

    names = [p.name for p in session.pieces]
    spans = find_pieces(scores, names, session.recording, rough_starts=[p.start_s for p in session.pieces],
                        duration_s=duration_s, progress=progress)
    lap("pieces")

    from ..align.run import align_score

    aligned = []
    for k, (p, sc, sp) in enumerate(zip(session.pieces, scores, spans)):
        prev_end = spans[k - 1].end_s if k else 0.0
        next_start = spans[k + 1].start_s if k + 1 < len(spans) else duration_s
        lo = max(prev_end, sp.start_s - SPAN_PAD_S, 0.0)
        hi = min(next_start, sp.end_s + SPAN_PAD_S, duration_s)
        try:
            res = align_score(sc, session.recording, anchors=list(p.anchors), force=session.force,
                              span_s=(lo, hi), progress=progress)
        except WorkFailed as exc:
            raise WorkFailed(f"piece '{p.name}' ({lo:.1f}-{hi:.1f} s of the recording): {exc}") from None
        aligned.append(res)
        warnings.extend(f"{p.name}: {w}" for w in getattr(res, "warnings", []) or [])
    lap("alignment")

    from ..audio.pipeline import compute_features

    feats = compute_features(session.recording, rate_hz=session.rate_hz, progress=progress)
    warnings.extend(str(w) for w in getattr(feats, "warnings", []) or [])
    frame = feats.frame
    lap("features")

    changes = None
    try:
        from ..stats.changes import change_points

        piece_spans = pd.DataFrame({"start": [s.start_s for s in spans], "end": [s.end_s for s in spans]})
        changes = change_points(frame.select_dtypes("number"), spans=piece_spans)
    except ImportError:
        changes = None
    except WorkFailed as exc:
        warnings.append(f"feature change points skipped: {exc}")
        changes = None
    lap("change points")

    # events
    tables = []
    beats = []
    pieces_out: list[PieceResult] = []
    low_conf: list[tuple[float, float]] = []
    for p, sc, sp, res in zip(session.pieces, scores, spans, aligned):
        to_rec = _timemap_call(res.timemap)
        conf = _confidence_fn(res)
        t = ev.piece_events(sc, piece=p.name, to_recording=to_rec, clock=clock, confidence=conf)
        tables.append(t)
        beats.append(ev.beat_table(sc, piece=p.name, to_recording=to_rec, clock=clock))
        row = t.iloc[0]
        low_conf.extend(_regions(res))
        if conf is not None and len(sc.notes):
            med = float(np.nanmedian(conf(np.unique(sc.notes["score_qn"].to_numpy(dtype=np.float64)))))
        else:
            med = float(getattr(res, "confidence", float("nan")))
        pieces_out.append(PieceResult(
            name=p.name, score_path=p.score, start_recording_s=float(row["recording"]),
            end_recording_s=float(row["recording"]) + float(row["duration"]) / clock.slope,
            start_onset_s=float(row["onset"]), end_onset_s=float(row["onset"] + row["duration"]),
            n_boundaries=int(len(t) - 1), median_confidence=med, locate_cost=sp.cost))
    tables.append(ev.silence_events(_silences(feats), clock=clock, min_duration_s=0.0))
    tables.append(ev.sync_events(mark_times, clock=clock))
    if changes is not None and len(changes):
        ch = changes.rename(columns={"features": "label"}) if "features" in changes.columns else changes
        tables.append(ev.change_events(ch, clock=clock))
    events = ev.merge_events(tables)
    frame = frame.copy()
    frame[ALIGNED_TEMPO] = _aligned_tempo(np.asarray(frame.index, dtype=np.float64), aligned, pieces_out)
    units = dict(getattr(feats, "units", {}) or {})
    units[ALIGNED_TEMPO] = "BPM"
    descriptions = dict(getattr(feats, "descriptions", {}) or {})
    descriptions[ALIGNED_TEMPO] = ("Tempo of the performance from the score alignment: beats per minute in "
                                   "the bar's beat unit, smoothed over a few beats; n/a outside the pieces.")
    beat_df = pd.concat(beats, ignore_index=True) if beats else pd.DataFrame()
    lap("events")

    # outputs
    from ..export import bids, provenance
    from ..export.tables import OutputSet

    base = output_base(session)
    synchronized = clock.method != "none"
    t_frames = np.asarray(frame.index, dtype=np.float64)
    stim_extra = {
        "Clock": ("recorder clock (onset)" if synchronized else "recording clock (no sync given)"),
        "FrameTime": "window centre",
        "RecordingStartTime": float(t_frames[0]) if t_frames.size else 0.0,
        "RecordingSamplingFrequency": float(session.rate_hz),
        "ClockFit": clock.to_dict(),
    }
    clock_label = "onset, recorder clock (s)" if synchronized else "recording time (s)"

    report_pieces = pd.DataFrame({
        "piece": [p.name for p in pieces_out],
        "start": [p.start_onset_s for p in pieces_out],
        "end": [p.end_onset_s for p in pieces_out],
    })
    on_frame = frame.copy()
    on_frame.index = pd.Index(np.asarray(clock(t_frames), dtype=np.float64), name="onset")
    sync_df = None
    if clock.method == "marks":
        sync_df = pd.DataFrame({"onset": clock(clock.recording_s), "residual_ms": clock.residuals_s * 1000})
    env = _envelope(session.recording, t_map=clock)
    lap("envelope")

    from ..report.figure import figure_png, overview_figure
    from ..report.html import write_report

    fig = overview_figure(
        features=on_frame, units=units, events=events, columns={"tempo": ALIGNED_TEMPO},
        pieces=report_pieces, low_confidence=[(float(clock(a)), float(clock(b))) for a, b in low_conf],
        sync=sync_df, envelope=env, time_column="onset", clock_label=clock_label,
        title=f"{base}: {', '.join(names)}")
    png = figure_png(fig)
    stats_tables = {}
    try:
        from ..stats.windows import piece_summary

        piece_table = piece_summary(on_frame, report_pieces, tempo_column=ALIGNED_TEMPO)
    except Exception as exc:  # summary numbers are a convenience; the report says why they are missing
        warnings.append(f"piece summary skipped: {type(exc).__name__}: {exc}")
        piece_table = report_pieces
    if changes is not None and len(changes):
        stats_tables["feature change points (recording time)"] = changes
    summary = {
        "recording file": str(session.recording),
        "duration (s)": round(duration_s, 3),
        "pieces": len(pieces_out),
        "boundaries placed": int(sum(p.n_boundaries for p in pieces_out)),
        "median confidence": round(float(np.nanmedian([p.median_confidence for p in pieces_out])), 3)
        if pieces_out else None,
        "clock": clock.method,
        "drift (ppm)": round(clock.drift_ppm, 3),
        "offset (s)": round(clock.offset_s, 6),
    }
    lap("report")

    settings = {
        "recording": str(session.recording),
        "pieces": [{"name": p.name, "score": str(p.score), "start_s": p.start_s, "anchors": p.anchors}
                   for p in session.pieces],
        "sync": {"mode": session.sync.mode, "kind": session.sync.kind, "frequency_hz": session.sync.frequency_hz,
                 "duration_s": session.sync.duration_s, "recorder_s": session.sync.recorder_s,
                 "recorder_file": None if session.sync.recorder_file is None else str(session.sync.recorder_file),
                 "recorder_column": session.sync.recorder_column, "offset_s": session.sync.offset_s,
                 "search_start_s": session.sync.search_start_s, "search_end_s": session.sync.search_end_s},
        "bids": dict(session.bids),
        "feature_rate_hz": session.rate_hz,
        "expand_repeats": session.expand_repeats,
        "force": session.force,
        "output": str(session.out_dir),
        "span_pad_s": SPAN_PAD_S,
        "sync_detection": _defaults(detect_sync_marks, ("min_score", "min_jump_db", "min_level_db",
                                                        "min_gap_s", "block_s")),
        "piece_search_max_ratio": MAX_RATIO,
        "low_confidence_below": LOW_CONFIDENCE,
        "pieces_found": [{"piece": s.piece, "start_s": s.start_s, "end_s": s.end_s, "cost": s.cost,
                          "method": s.method} for s in spans],
        "clock_fit": clock.to_dict(),
    }
    inputs = {"recording": session.recording}
    for p in session.pieces:
        inputs[f"score:{p.name}"] = p.score
    if session.source is not None:
        inputs["session"] = session.source
    if session.sync.recorder_file is not None:
        inputs["recorder_sync"] = session.sync.recorder_file

    stim, dropped = _stim_frame(frame)
    if dropped:
        stim_extra["ColumnsLeftOut"] = {c: "text feature; kept out of the numeric continuous file"
                                        for c in dropped}
    with OutputSet(out_dir) as outs:
        written = []
        written += bids.write_events(outs, base, events, synchronized=synchronized,
                                     extra={"ClockFit": clock.to_dict()})
        written += bids.write_stim(outs, base, stim,
                                   sampling_hz=session.rate_hz / clock.slope,
                                   start_time_s=float(clock(t_frames[0])) if t_frames.size else 0.0,
                                   units=units, descriptions=descriptions,
                                   extra=stim_extra)
        written += bids.write_beats(outs, base, beat_df)
        written.append(bids.write_dataset_description(outs, name=f"stimkit annotation of {base}"))
        written += write_report(outs, title=f"stimkit report: {base}", figure_png=png, summary=summary,
                                pieces=piece_table, events=events, stats=stats_tables,
                                warnings=warnings, sync=clock.to_dict() if clock.method != "none" else None)
        lap("write")
        prov = provenance.build_provenance(
            command=list(command) if command else ["stimkit", "annotate",
                                                   str(session.source or session.recording)],
            inputs=inputs, settings=settings, warnings=warnings, timings=timings)
        written.append(provenance.write_provenance(outs, prov, with_timings=True))
    return AnnotateResult(out_dir=out_dir, base=base, written=[Path(w) for w in written], pieces=pieces_out,
                          clock=clock, events=events, beats=beat_df, warnings=warnings, timings_s=timings)


def summary_lines(result: AnnotateResult) -> list[str]:
    """Short lines for people: pieces, boundaries, confidence, clock, outputs."""
    lines = []
    for p in result.pieces:
        lines.append(f"piece {p.name}: {p.start_onset_s:.3f} s to {p.end_onset_s:.3f} s "
                     f"({p.n_boundaries} boundaries, median confidence {p.median_confidence:.2f})")
    n_b = sum(p.n_boundaries for p in result.pieces)
    med = float(np.nanmedian([p.median_confidence for p in result.pieces])) if result.pieces else float("nan")
    lines.append(f"{len(result.pieces)} piece(s) found, {n_b} boundaries placed, median confidence {med:.2f}")
    c = result.clock
    if c.method == "marks":
        lines.append(f"clock: {c.recording_s.size} sync marks, offset {c.offset_s:.4f} s, drift "
                     f"{c.drift_ppm:+.2f} ppm, largest residual {c.max_residual_s * 1000:.2f} ms")
    elif c.method == "offset":
        lines.append(f"clock: stated offset {c.offset_s:.4f} s, no drift")
    else:
        lines.append("clock: no sync given; onset = recording time")
    if result.warnings:
        lines.append(f"{len(result.warnings)} warning(s), listed in report.html and provenance.json")
    lines.append(f"outputs in {result.out_dir}:")
    lines.extend(f"  {p.name}" for p in sorted(result.written, key=lambda q: q.name))
    return lines
