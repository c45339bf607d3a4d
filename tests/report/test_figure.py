"""The report's pictures: readable overview, every boundary labelled per piece, deterministic
PNG and SVG, hover texts on the SVG elements."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from stimkit.report.figure import (clock_text, figure_png, figure_svg, overview_figure, piece_figure)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


def _overview(s, **kw):
    args = dict(features=s["features"], units=s["units"], events=s["events"], pieces=s["pieces"],
                low_confidence=[(200.0, 220.0, "x"), {"start": 60.0, "end": 60.2, "reason": "y"}],
                sync=s["sync"], time_column="onset", title="t")
    args.update(kw)
    return overview_figure(**args)


def _piece(s, k=0, **kw):
    p = s["pieces"].iloc[k]
    args = dict(piece=p["piece"], start=p["start"], end=p["end"], features=s["features"], units=s["units"],
                events=s["events"], beats=s["beats"], low_confidence=[(200.0, 220.0)], time_column="onset")
    args.update(kw)
    return piece_figure(**args)


def test_clock_text_hand_computed():
    assert clock_text(0) == "0:00" and clock_text(75.4) == "1:15"
    assert clock_text(3725.0) == "1:02:05"                      # 1 h 2 min 5 s
    assert clock_text(65.25, decimals=1) == "1:05.2" or clock_text(65.25, decimals=1) == "1:05.3"
    assert clock_text(30, span_s=7200) == "0:00:30"             # h:mm:ss once the axis reaches an hour


def test_png_and_svg_rerun_bytes(session):
    a, b = figure_png(_overview(session)), figure_png(_overview(session))
    assert a.startswith(PNG_SIGNATURE) and a == b              # DESIGN.md: byte-identical reruns
    assert b"matplotlib" not in a.lower()
    tips1, tips2 = {}, {}
    s1 = figure_svg(_piece(session, tips=tips1), tips=tips1, svg_id="x")
    s2 = figure_svg(_piece(session, tips=tips2), tips=tips2, svg_id="x")
    assert s1 == s2
    assert "http" not in s1 and "<metadata" not in s1 and not s1.startswith("<?xml")


def test_overview_counts_every_boundary_in_the_density_row(session):
    fig = _overview(session)
    dens = next(ax for ax in fig.axes if "boundaries" in ax.get_ylabel())
    total = sum(p.get_height() for p in dens.patches)
    ev = session["events"]
    assert total == len(ev[~ev["trial_type"].isin(["piece", "repeat"])])
    check = next(ax for ax in fig.axes if ax.get_ylabel() == "check by ear")
    assert "2 places to check by ear" in check.get_title(loc="right")
    assert "1 repeat skipped" in check.get_title(loc="right")
    ticks = [t.get_text() for t in fig.axes[-1].get_xticklabels()]
    assert all(re.fullmatch(r"\d+:\d\d", t) for t in ticks if t)   # m:ss axis


def test_every_boundary_of_a_piece_has_a_label_and_a_hover_text(session):
    tips = {}
    fig = _piece(session, tips=tips, id_prefix="p1")
    ev = session["events"]
    mine = ev[(ev["piece"] == "First") & (ev["trial_type"] != "piece")]
    session_rows = ev[ev["piece"].isna() & (ev["onset"] >= 2.0) & (ev["onset"] <= 142.0)]
    n = len(mine) + len(session_rows)
    assert len(tips) == n
    fig.canvas.draw()
    for ax in fig.axes:
        labels = [t for t in ax.texts if t.get_text().startswith(" ")]
        boxes = [t.get_window_extent() for t in labels]
        for i in range(len(boxes)):                           # stacked, never overlapping
            for j in range(i + 1, len(boxes)):
                assert not boxes[i].overlaps(boxes[j])
    n_labels = sum(1 for ax in fig.axes for t in ax.texts if t.get_text().startswith(" "))
    assert n_labels == n                                        # none left out
    svg = figure_svg(fig, tips=tips, svg_id="panel-1")
    assert svg.count("<title>") == n
    assert "bar 0, beat 1" in svg and "&lt;ff&gt; &amp; co" in svg   # escaped; the beat as players count
    assert "beat 2\u00bd" in svg


def test_dense_piece_is_written_in_several_systems(session):
    n = 200
    t = np.linspace(3.0, 140.0, n)
    ev = pd.DataFrame({"onset": t, "duration": 0.0, "trial_type": "dynamic", "piece": "First",
                       "label": "crescendo molto"})
    fig = _piece(session, events=ev)
    systems = [ax for ax in fig.axes if not ax.get_ylabel()]
    assert len(systems) >= 200 // 22
    assert sum(1 for ax in fig.axes for x in ax.texts if "crescendo" in x.get_text()) == n


def test_empty_features_still_draw(session):
    fig = overview_figure(features=pd.DataFrame(index=pd.Index([], dtype=float)), units={},
                          events=session["events"], time_column="onset")
    assert figure_png(fig).startswith(PNG_SIGNATURE)
    fig = _piece(session, features=None)
    assert figure_png(fig).startswith(PNG_SIGNATURE)


def test_piece_lanes_by_role_with_fallback(session):
    def rights(fig):
        return [ax.get_title(loc="right") for ax in fig.axes]

    assert "key ambiguity (1 - key_strength)" in rights(_piece(session))
    f2 = session["features"].drop(columns=["tempo_bpm", "key_strength"])
    f2["roughness"] = 0.1
    titles = rights(_piece(session, features=f2))
    assert "roughness" in titles and "tempo_bpm" not in titles   # absent column: lane skipped; fallback
