"""The session report of one ``annotate`` run, assembled from the hand-off tables.

What it computes
----------------
:func:`build_report` turns the run's tables (already on the recorder clock where they carry
``onset``) into the parts of the report: the overview picture (PNG for print, SVG for the
page), one SVG panel per piece, the places to check by ear, and the times of the clicks of the
check-by-ear file. :func:`write_session_report` stages ``report.png``, ``report.html`` and
``check-by-ear.flac`` in the run's :class:`~stimkit.export.tables.OutputSet`.

Conventions
-----------
One clock for the page: the recorder clock (``onset``) when a sync was given, else recording
time; regions given in recording seconds are mapped through the clock fit here, and so are the
feature change points of the statistics. The click track alone stays on recording time (it is
the recording).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import figure as fg
from .check import check_places, click_track

__all__ = ["ReportParts", "build_report", "write_session_report", "CHECK_AUDIO_NAME"]

#: File name of the check-by-ear recording beside the report.
CHECK_AUDIO_NAME = "check-by-ear.flac"


@dataclass
class ReportParts:
    png: bytes
    overview_svg: str
    piece_panels: list = field(default_factory=list)
    check: pd.DataFrame | None = None
    clock_label: str = "recording time"
    stats: dict = field(default_factory=dict)
    bars_recording_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    boundaries_recording_s: np.ndarray = field(default_factory=lambda: np.zeros(0))


def _on_clock(regions, clock) -> list[dict]:
    out = []
    for r in fg.regions_of(regions):
        out.append({"start": float(clock(r["start"])), "end": float(clock(r["end"])), "reason": r["reason"]})
    return out


def build_report(*, title: str, clock, events: pd.DataFrame, beats: pd.DataFrame | None,
                 features: pd.DataFrame, units: dict, pieces: pd.DataFrame, regions_recording,
                 changes: pd.DataFrame | None = None, pieces_info: list | None = None,
                 columns: dict | None = None) -> ReportParts:
    """The report's parts (see the module notes).

    Parameters
    ----------
    title : str
    clock : callable
        ``recording -> onset`` (a :class:`~stimkit.timeline.clock.ClockFit`); its ``method`` says
        whether a sync was given.
    events, beats : DataFrame
        The event table and the beat grid, with ``onset`` and ``recording``.
    features : DataFrame
        Indexed by ``onset``.
    pieces : DataFrame
        ``piece``, ``start``, ``end`` on the onset clock.
    regions_recording : list
        Low-confidence regions in recording seconds (tuples or dicts, see
        :func:`stimkit.report.figure.regions_of`).
    changes : DataFrame, optional
        Feature change points with ``recording`` (s): shown with ``onset`` instead.
    pieces_info : list, optional
        Per piece objects with ``median_confidence`` (shown in the panel facts).
    columns : dict, optional
        Lane role -> column overrides.
    """
    synchronized = getattr(clock, "method", "none") != "none"
    clock_label = "onset, recorder clock" if synchronized else "recording time"
    regions = _on_clock(regions_recording, clock)
    tips: dict = {}
    sync_df = None
    if getattr(clock, "method", None) == "marks":
        sync_df = pd.DataFrame({"onset": clock(clock.recording_s), "residual_ms": clock.residuals_s * 1000})
    ov = fg.overview_figure(features=features, units=units, events=events, pieces=pieces,
                            low_confidence=regions, sync=sync_df, time_column="onset",
                            clock_label=clock_label, title=title, columns=columns, tips=tips)
    png = fg.figure_png(ov)
    overview_svg = fg.figure_svg(ov, tips=tips, svg_id="overview")
    panels = []
    for k, p in enumerate(pieces.itertuples(index=False), start=1):
        tips = {}
        fig = fg.piece_figure(piece=p.piece, start=float(p.start), end=float(p.end), features=features,
                              units=units, events=events, beats=beats, low_confidence=regions,
                              time_column="onset", clock_label=clock_label, columns=columns, tips=tips,
                              id_prefix=f"p{k}")
        facts = {"from": fg.clock_text(p.start, decimals=1), "to": fg.clock_text(p.end, decimals=1),
                 "length": fg.clock_text(float(p.end) - float(p.start), decimals=1)}
        if pieces_info is not None and k <= len(pieces_info):
            mc = getattr(pieces_info[k - 1], "median_confidence", None)
            if mc is not None and np.isfinite(mc):
                facts["median confidence"] = f"{float(mc):.2f}"
        panels.append({"name": str(p.piece), "facts": facts,
                       "svg": fg.figure_svg(fig, tips=tips, svg_id=f"panel-{k}")})
    reps = fg.repeats_of(events, "onset")
    check = check_places(regions=regions, repeats=reps, pieces=pieces, beats=beats, time_column="onset")
    stats = {}
    if changes is not None and len(changes) and "recording" in changes.columns:
        ch = changes.copy()
        ch.insert(0, "onset", np.asarray(clock(ch["recording"].to_numpy(np.float64)), dtype=np.float64))
        stats[f"feature change points ({clock_label})"] = ch.drop(columns=["recording"])
    # click times, on the recording's own axis
    bars = np.zeros(0)
    if beats is not None and len(beats) and "recording" in beats.columns:
        down = (beats["is_downbeat"].map(lambda v: v is True or str(v).lower() == "true")
                if "is_downbeat" in beats.columns else pd.to_numeric(beats.get("beat"), errors="coerce") == 1)
        bars = pd.to_numeric(beats.loc[down.to_numpy(bool), "recording"], errors="coerce").to_numpy(np.float64)
    bounds = np.zeros(0)
    if events is not None and len(events) and "recording" in events.columns and "source" in events.columns:
        sel = (events["source"].astype(str) == "alignment") & (events["trial_type"].astype(str) != "repeat")
        bounds = pd.to_numeric(events.loc[sel, "recording"], errors="coerce").to_numpy(np.float64)
    return ReportParts(png=png, overview_svg=overview_svg, piece_panels=panels, check=check,
                       clock_label=clock_label, stats=stats, bars_recording_s=bars,
                       boundaries_recording_s=bounds)


def write_session_report(outs, parts: ReportParts, *, recording, title: str, summary: dict,
                         piece_table: pd.DataFrame | None, events: pd.DataFrame, stats: dict,
                         warnings: list[str], sync: dict | None, check_audio: bool = True,
                         extra_sections=None, name: str = "report",
                         check_name: str = CHECK_AUDIO_NAME) -> list:
    """Stage ``<name>.png``, ``<name>.html`` and (when ``check_audio``) ``<check_name>``
    (default ``report.png``, ``report.html``, ``check-by-ear.flac``; names may hold a sub-folder,
    the page and the listening file stay side by side)."""
    from pathlib import PurePosixPath

    from .html import write_report

    written = []
    audio = None
    if check_audio:
        data = click_track(recording, bars_s=parts.bars_recording_s, boundaries_s=parts.boundaries_recording_s)
        written.append(outs.write_bytes(check_name, data))
        audio = PurePosixPath(check_name).name  # linked from the page beside it
    written += write_report(outs, title=title, figure_png=parts.png, summary=summary, pieces=piece_table,
                            events=events, stats={**parts.stats, **(stats or {})}, warnings=warnings,
                            sync=sync, overview_svg=parts.overview_svg, piece_panels=parts.piece_panels,
                            check=parts.check, check_audio=audio, clock_label=parts.clock_label,
                            extra_sections=extra_sections, name=name)
    return written
