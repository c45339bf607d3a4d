"""The hand-off files of one ``annotate`` run, written together or not at all.

What it writes
--------------
Through one :class:`~stimkit.export.tables.OutputSet` (atomic: a failure or an interrupt leaves
no file): ``<base>_events.tsv/.json`` (BIDS events, :func:`stimkit.export.bids.write_events`),
``<base>_stim.tsv.gz/.json`` (the continuous features on the recorder clock,
:func:`stimkit.export.bids.write_stim`), ``<base>_beats.tsv/.json``, ``dataset_description.json``,
``report.png``, ``report.html`` and ``check-by-ear.flac`` (:mod:`stimkit.report.build`) and
``provenance.json``
(:mod:`stimkit.export.provenance`).

Conventions
-----------
- ``<base>`` is the BIDS name from the session's entities (``sub-01_ses-1_task-music_run-1``),
  or the recording's file name when none are given (:func:`output_base`).
- The continuous file is on the recorder clock: its rows are at ``StartTime + k /
  SamplingFrequency`` with ``StartTime = onset(t0)`` and ``SamplingFrequency = rate_hz / slope``
  (the feature frames are evenly spaced on the recording clock, so on the recorder clock their
  spacing is stretched by the clock slope). Each row is the feature of one window, at the
  window's centre. Text features are left out of that numeric file (listed in its sidecar).
- The report's pictures and tables are on ``onset`` (one clock for the page).
- Timings of the steps are the only part of ``provenance.json`` that changes between reruns.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .clock import ClockFit, detect_sync_marks

__all__ = ["HandoffData", "write_handoff", "output_base", "ALIGNED_TEMPO"]

#: Column added to the continuous features: the tempo from the score alignment.
ALIGNED_TEMPO = "aligned_tempo_bpm"


@dataclass
class HandoffData:
    """Everything the hand-off files are made of (all times in ``recording`` seconds unless the
    field says otherwise; ``events`` and ``beats`` already carry ``onset``)."""

    session: object
    out_dir: Path
    duration_s: float
    clock: ClockFit
    events: pd.DataFrame
    beats: pd.DataFrame
    frame: pd.DataFrame                 # features, indexed by frame-centre recording time
    units: dict
    descriptions: dict
    pieces: list                        # stimkit.timeline.run.PieceResult
    spans: list                         # stimkit.timeline.segment.PieceSpan
    low_confidence: list                # (start, end, reason) recording seconds
    changes: pd.DataFrame | None
    warnings: list[str]
    timings: dict
    settings: dict = field(default_factory=dict)  # extra settings of the chain
    physio: list = field(default_factory=list)         # stimkit.physio.RelateResult per [[physio]]
    physio_inputs: dict = field(default_factory=dict)  # participant label -> physiological file


def output_base(session) -> str:
    from ..export.bids import bids_name

    fallback = Path(session.recording).name.split(".")[0] or "stimkit"
    return bids_name(subject=session.bids.get("subject"), session=session.bids.get("session"),
                     task=session.bids.get("task"), run=session.bids.get("run"), fallback=fallback)


def _defaults(fn, names) -> dict:
    import inspect

    sig = inspect.signature(fn)
    return {n: sig.parameters[n].default for n in names if n in sig.parameters}


# ---------------------------------------------------------------------------------------------


def write_handoff(d: HandoffData, *, command: list[str] | None = None, lap=None) -> list[Path]:
    """Stage and commit every hand-off file (see module notes); returns the paths written.

    ``lap(name)``, when given, is called after the report and after the writes so their time
    lands in the provenance timings.
    """
    from ..export import bids, provenance
    from ..export.tables import OutputSet

    lap = lap or (lambda name: None)
    session, clock, events, frame = d.session, d.clock, d.events, d.frame
    units, descriptions, pieces_out, warnings = d.units, d.descriptions, d.pieces, d.warnings
    low_conf, changes, spans, timings = d.low_confidence, d.changes, d.spans, d.timings
    duration_s, beat_df, out_dir = d.duration_s, d.beats, d.out_dir
    names = [p.name for p in pieces_out]
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

    report_pieces = pd.DataFrame({
        "piece": [p.name for p in pieces_out],
        "start": [p.start_onset_s for p in pieces_out],
        "end": [p.end_onset_s for p in pieces_out],
    })
    on_frame = frame.copy()
    on_frame.index = pd.Index(np.asarray(clock(t_frames), dtype=np.float64), name="onset")
    from ..report.build import build_report, write_session_report

    parts = build_report(title=f"{base}: {', '.join(names)}", clock=clock, events=events, beats=beat_df,
                         features=on_frame, units=units, pieces=report_pieces, regions_recording=low_conf,
                         changes=changes, pieces_info=pieces_out, columns={"tempo": ALIGNED_TEMPO})
    stats_tables = {}
    try:
        from ..stats.windows import piece_summary

        piece_table = piece_summary(on_frame, report_pieces, tempo_column=ALIGNED_TEMPO)
    except Exception as exc:  # summary numbers are a convenience; the report says why they are missing
        warnings.append(f"piece summary skipped: {type(exc).__name__}: {exc}")
        piece_table = report_pieces
    base_dir = Path(session.source).parent if session.source is not None else Path.cwd()

    def portable(path):
        return None if path is None else provenance.portable_path(path, base_dir)

    summary = {
        "recording file": portable(session.recording),
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
        "recording": portable(session.recording),
        "pieces": [{"name": p.name, "score": portable(p.score), "start_s": p.start_s, "anchors": p.anchors}
                   for p in session.pieces],
        "sync": {"mode": session.sync.mode, "kind": session.sync.kind, "frequency_hz": session.sync.frequency_hz,
                 "duration_s": session.sync.duration_s, "recorder_s": session.sync.recorder_s,
                 "recorder_file": portable(session.sync.recorder_file),
                 "recorder_column": session.sync.recorder_column, "offset_s": session.sync.offset_s,
                 "search_start_s": session.sync.search_start_s, "search_end_s": session.sync.search_end_s},
        "bids": dict(session.bids),
        "feature_rate_hz": session.rate_hz,
        "expand_repeats": session.expand_repeats,
        "force": session.force,
        "output": ".",
        **d.settings,
        "sync_detection": _defaults(detect_sync_marks, ("min_score", "min_jump_db", "min_level_db",
                                                        "min_gap_s", "block_s")),
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
    for label, f in d.physio_inputs.items():
        inputs[f"physio:{label}"] = f

    stim = frame  # write_stim keeps numeric columns and lists the text ones it leaves out
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
        extra_sections = []
        if d.physio:  # relate results: physio/ tables and figures, and their report section
            from ..physio.outputs import write_relate
            from ..report.physio_section import SECTION_HEADING, physio_section_html

            figs: dict = {}
            written += write_relate(outs, d.physio, inputs={f"physio:{k}": v for k, v in d.physio_inputs.items()},
                                    paths_base=Path(session.source).parent if session.source else None,
                                    prefix="physio/", command=command, figures_out=figs)
            extra_sections.append((SECTION_HEADING, physio_section_html(d.physio, figures=figs)))
        written += write_session_report(outs, parts, recording=session.recording,
                                        title=f"stimkit report: {base}", summary=summary,
                                        piece_table=piece_table, events=events, stats=stats_tables,
                                        warnings=warnings,
                                        sync=clock.to_dict() if clock.method != "none" else None,
                                        check_audio=getattr(session, "check_audio", True),
                                        extra_sections=extra_sections)
        lap("write")
        prov = provenance.build_provenance(
            command=provenance.portable_command(
                list(command) if command else ["stimkit", "annotate", str(session.source or session.recording)],
                base_dir=base_dir, out_dir=out_dir),
            inputs=inputs, settings=settings, warnings=warnings, timings=timings, base_dir=base_dir)
        written.append(provenance.write_provenance(outs, prov, with_timings=True))
    return [Path(w) for w in written]
