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

Layout (:func:`output_layout`)
------------------------------
- With a BIDS ``subject`` the output folder is a BIDS dataset: ``dataset_description.json`` and
  ``.bidsignore`` at its top, and every file of the run in ``sub-<s>/[ses-<x>/]beh/`` named
  ``<base>_...``: the BIDS files ``_events.tsv/.json`` and ``_stim.tsv.gz/.json``, and beside
  them the files BIDS does not define, ``_beats.tsv/.json``, ``_report.html/.png``,
  ``_check-by-ear.flac``, ``_provenance.json`` and the physiology results in the folder
  ``<base>_relate/``, which ``.bidsignore`` hides from validators. Several sessions and runs
  can share one output folder without overwriting each other.
- Without a subject the layout is flat: all files in the output folder, with ``report.html``,
  ``report.png``, ``check-by-ear.flac``, ``provenance.json`` and the folder ``physio/`` under
  those plain names.

Conventions
-----------
- ``<base>`` is the BIDS name from the session's entities (``sub-01_ses-1_task-music_run-1``),
  or the recording's file name when none are given (:func:`output_base`).
- No output may be, or link to, an input (the recording, a score, the session file, the
  recorder's sync file): :func:`check_outputs_against_inputs` refuses such a session before
  the work, and the :class:`~stimkit.export.tables.OutputSet` refuses it again when it writes.
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

__all__ = ["HandoffData", "write_handoff", "output_base", "output_layout", "planned_outputs",
           "session_inputs", "check_outputs_against_inputs", "ALIGNED_TEMPO", "BIDSIGNORE"]

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
    base_dir: Path | None = None        # paths in the outputs are relative to it (default: the
                                        # session file's folder, else the current folder)
    keep_timings: bool = True           # step timings in provenance.json (the one varying part)
    physio: list = field(default_factory=list)         # stimkit.physio.RelateResult per [[physio]]
    physio_inputs: dict = field(default_factory=dict)  # participant label -> physiological file


def output_base(session) -> str:
    from ..export.bids import bids_name

    fallback = Path(session.recording).name.split(".")[0] or "stimkit"
    return bids_name(subject=session.bids.get("subject"), session=session.bids.get("session"),
                     task=session.bids.get("task"), run=session.bids.get("run"), fallback=fallback)


#: ``.bidsignore`` of a nested output folder: the files stimkit writes that BIDS does not define.
BIDSIGNORE = ("# files written by stimkit beside the BIDS files; not defined by BIDS\n"
              "*_beats.tsv\n*_beats.json\n*_report.html\n*_report.png\n*_provenance.json\n"
              "*_check-by-ear.flac\n*_relate\n")


@dataclass(frozen=True)
class OutputLayout:
    """Where one run's files go, relative to the output folder (see the module notes)."""

    base: str
    data_dir: str       # "" (flat) or "sub-01/ses-1/beh"
    nested: bool

    def data(self, suffix: str) -> str:
        """Relative name of ``<base><suffix>`` in the data folder."""
        return f"{self.data_dir}/{self.base}{suffix}" if self.data_dir else f"{self.base}{suffix}"

    @property
    def report(self) -> str:
        """Name of the report without its extension (``write_report``'s ``name``)."""
        return self.data("_report") if self.nested else "report"

    @property
    def provenance(self) -> str:
        return self.data("_provenance.json") if self.nested else "provenance.json"

    @property
    def relate_dir(self) -> str:
        """Folder prefix (with its slash) of the physiology results (``stimkit.physio``)."""
        return self.data("_relate/") if self.nested else "physio/"

    @property
    def check_audio(self) -> str:
        """Name of the listening file of the report (:mod:`stimkit.report.build`)."""
        return self.data("_check-by-ear.flac") if self.nested else "check-by-ear.flac"

    def names(self) -> list[str]:
        """Every file a run writes, relative to the output folder."""
        out = [self.data(s) for s in ("_events.tsv", "_events.json", "_stim.tsv.gz", "_stim.json",
                                      "_beats.tsv", "_beats.json")]
        out += ["dataset_description.json", f"{self.report}.png", f"{self.report}.html", self.provenance,
                self.check_audio]
        if self.nested:
            out.append(".bidsignore")
        return out


def output_layout(session) -> OutputLayout:
    """The run's :class:`OutputLayout`: nested BIDS folders when a subject is given, else flat."""
    base = output_base(session)
    sub, ses = session.bids.get("subject"), session.bids.get("session")
    if not sub:
        return OutputLayout(base=base, data_dir="", nested=False)
    parts = [f"sub-{sub}"] + ([f"ses-{ses}"] if ses else []) + ["beh"]
    return OutputLayout(base=base, data_dir="/".join(parts), nested=True)


def session_inputs(session, *, physio: bool = True) -> dict[str, Path]:
    """Role -> path of every file the session reads (hashed in the provenance, never overwritten);
    ``physio=False`` leaves out the physiological files (the chain names those by participant)."""
    inputs = {"recording": Path(session.recording)}
    for p in session.pieces:
        inputs[f"score:{p.name}"] = Path(p.score)
    if session.source is not None:
        inputs["session"] = Path(session.source)
    if session.sync.recorder_file is not None:
        inputs["recorder_sync"] = Path(session.sync.recorder_file)
    for i, spec in enumerate((getattr(session, "physio", None) or []) if physio else []):
        inputs[f"physio:{spec.participant or i + 1}"] = Path(spec.file)
    return inputs


def planned_outputs(session) -> list[Path]:
    """Every file a run of ``session`` writes (absolute or relative to the current folder)."""
    lay = output_layout(session)
    return [Path(session.out_dir) / n for n in lay.names()]


def check_outputs_against_inputs(session) -> None:
    """Refuse (:class:`~stimkit.errors.InputError`, exit 2) a session one of whose outputs is, or
    links to, one of its inputs, or cannot be written (a name too long for the file system, a
    folder in the way: :func:`~stimkit.export.tables.check_targets`) -- before any work is done
    and nothing is written."""
    from ..errors import InputError
    from ..export.tables import check_targets, input_clash

    check_targets(session.out_dir, output_layout(session).names())  # name too long, a folder in the way
    inputs = session_inputs(session)
    for target in planned_outputs(session):
        clash = input_clash(target, inputs.values())
        if clash is not None:
            role = next(r for r, q in inputs.items() if q == clash).split(":")[0].replace("_", " ")
            raise InputError(f"the output {target.name} would overwrite the {role} file {clash}; "
                             f"choose another output folder (output = ... in the session file, or "
                             f"-o) or move that file", path=session.source or target)


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
    layout = output_layout(session)
    base = layout.base
    shown_events = bids.events_for_writing(events)  # the report shows the rows the TSV holds
    synchronized = clock.method != "none"
    t_frames = np.asarray(frame.index, dtype=np.float64)
    stim_extra = {
        "Clock": ("recorder clock (onset)" if synchronized else "recording clock (no sync given)"),
        "FrameTime": "window centre",
        "RecordingStartTime": float(t_frames[0]) if t_frames.size else 0.0,
        "RecordingSamplingFrequency": float(session.rate_hz),
        "ClockFit": clock.to_dict(),
    }
    if session.bids.get("task"):
        stim_extra["TaskName"] = session.bids["task"]

    report_pieces = pd.DataFrame({
        "piece": [p.name for p in pieces_out],
        "start": [p.start_onset_s for p in pieces_out],
        "end": [p.end_onset_s for p in pieces_out],
    })
    on_frame = frame.copy()
    on_frame.index = pd.Index(np.asarray(clock(t_frames), dtype=np.float64), name="onset")
    from ..report.build import build_report, write_session_report

    parts = build_report(title=f"{base}: {', '.join(names)}", clock=clock, events=shown_events, beats=beat_df,
                         features=on_frame, units=units, pieces=report_pieces, regions_recording=low_conf,
                         changes=changes, pieces_info=pieces_out, columns={"tempo": ALIGNED_TEMPO})
    stats_tables = {}
    try:
        from ..stats.windows import piece_summary

        piece_table = piece_summary(on_frame, report_pieces, tempo_column=ALIGNED_TEMPO)
    except Exception as exc:  # summary numbers are a convenience; the report says why they are missing
        warnings.append(f"piece summary skipped: {type(exc).__name__}: {exc}")
        piece_table = report_pieces
    base_dir = d.base_dir or (Path(session.source).parent if session.source is not None else Path.cwd())

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
    inputs = session_inputs(session, physio=False)
    for label, f in d.physio_inputs.items():
        inputs[f"physio:{label}"] = f
    task = session.bids.get("task")
    events_extra = {"TaskName": task} if task else {}
    events_extra["ClockFit"] = clock.to_dict()

    stim = frame  # write_stim keeps numeric columns and lists the text ones it leaves out
    prefix = layout.data("")
    with OutputSet(out_dir, inputs=inputs.values()) as outs:
        written = []
        written += bids.write_events(outs, prefix, shown_events, synchronized=synchronized,
                                     extra=events_extra)
        written += bids.write_stim(outs, prefix, stim,
                                   sampling_hz=session.rate_hz / clock.slope,
                                   start_time_s=float(clock(t_frames[0])) if t_frames.size else 0.0,
                                   units=units, descriptions=descriptions,
                                   extra=stim_extra)
        written += bids.write_beats(outs, prefix, beat_df)
        written.append(bids.write_dataset_description(
            outs, name="stimkit stimulus annotation" if layout.nested else f"stimkit annotation of {base}"))
        if layout.nested:
            written.append(outs.write_text(".bidsignore", BIDSIGNORE))
        extra_sections = []
        if d.physio:  # relate results: physio/ tables and figures, and their report section
            from ..physio.outputs import write_relate
            from ..report.physio_section import SECTION_HEADING, physio_section_html

            figs: dict = {}
            written += write_relate(outs, d.physio, inputs={f"physio:{k}": v for k, v in d.physio_inputs.items()},
                                    paths_base=Path(session.source).parent if session.source else None,
                                    prefix=layout.relate_dir, command=command, figures_out=figs)
            extra_sections.append((SECTION_HEADING, physio_section_html(d.physio, figures=figs)))
        written += write_session_report(outs, parts, recording=session.recording,
                                        title=f"stimkit report: {base}", summary=summary,
                                        piece_table=piece_table, events=shown_events, stats=stats_tables,
                                        warnings=warnings,
                                        sync=clock.to_dict() if clock.method != "none" else None,
                                        check_audio=getattr(session, "check_audio", True),
                                        name=layout.report, check_name=layout.check_audio,
                                        extra_sections=extra_sections)
        lap("write")
        prov = provenance.build_provenance(
            command=provenance.portable_command(
                list(command) if command else ["stimkit", "annotate", str(session.source or session.recording)],
                base_dir=base_dir, out_dir=out_dir),
            inputs=inputs, settings=settings, warnings=warnings, timings=timings, base_dir=base_dir)
        written.append(provenance.write_provenance(outs, prov, name=layout.provenance,
                                                   with_timings=d.keep_timings))
    return [Path(w) for w in written]
