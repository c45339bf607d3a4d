"""The HTML report: self-contained and offline, escaped, deterministic, one clock, the places
to check by ear first, residuals in milliseconds."""

from __future__ import annotations

import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from stimkit.export.tables import OutputSet
from stimkit.report.check import check_places
from stimkit.report.figure import figure_png, figure_svg, overview_figure, piece_figure, regions_of, repeats_of
from stimkit.report.html import report_html, sync_section, write_report
from stimkit.stats.windows import piece_summary


@pytest.fixture(scope="module")
def written(session, tmp_path_factory):
    tips = {}
    ov = overview_figure(features=session["features"], units=session["units"], events=session["events"],
                         pieces=session["pieces"], low_confidence=[(200.0, 220.0, "poor match")],
                         time_column="onset", tips=tips)
    p = session["pieces"].iloc[1]
    ptips = {}
    pf = piece_figure(piece=p["piece"], start=p["start"], end=p["end"], features=session["features"],
                      units=session["units"], events=session["events"], beats=session["beats"],
                      time_column="onset", tips=ptips, id_prefix="p2")
    check = check_places(regions=regions_of([(200.0, 220.0, "poor match")]),
                         repeats=repeats_of(session["events"], "onset"), pieces=session["pieces"],
                         beats=session["beats"])
    kw = dict(title="Session <7> & more", figure_png=figure_png(ov), summary={"pieces": 2, "duration_s": 300.0},
              pieces=piece_summary(session["features"], session["pieces"]), events=session["events"],
              stats={"feature change points (onset)": pd.DataFrame({"onset": [10.0], "strength": [1.5]})},
              warnings=["bar 12 <rit.> not aligned"],
              sync={"method": "marks", "offset_s": 1.25, "drift_ppm": 31.0,
                    "points": [{"recording_s": 1.0, "recorder_s": 2.25, "residual_s": 0.00036},
                               {"recording_s": 100.0, "recorder_s": 101.25, "residual_s": -0.0002},
                               {"recording_s": 250.0, "recorder_s": 251.26, "residual_s": -0.00016}]},
              overview_svg=figure_svg(ov, tips=tips, svg_id="overview"),
              piece_panels=[{"name": "Second", "svg": figure_svg(pf, tips=ptips, svg_id="panel-2"),
                             "facts": {"from": "2:32"}}],
              check=check, check_audio="check-by-ear.flac", clock_label="onset, recorder clock",
              extra_sections=[("Physiology", "<p>heart rate section</p>")])
    dirs = []
    for name in ("a", "b"):
        out = tmp_path_factory.mktemp(name)
        with OutputSet(out) as outs:
            paths = write_report(outs, **kw)
        dirs.append(out)
    return dirs, paths, kw


def _page(written):
    return (written[0][0] / "report.html").read_text("utf-8")


def test_files_and_rerun(written):
    (a, b), paths, kw = written
    assert [p.name for p in paths] == ["report.png", "report.html"]
    assert (a / "report.png").read_bytes() == kw["figure_png"]
    for name in ("report.png", "report.html"):
        assert (a / name).read_bytes() == (b / name).read_bytes()  # byte-identical rerun


def test_self_contained_and_offline(written):
    page = _page(written)
    assert "http://" not in page and "https://" not in page and "//" not in re.sub(r"<script>.*?</script>", "", page, flags=re.S)
    assert "url(http" not in page and "@import" not in page
    assert not re.findall(r'src="(?!data:)', page)                    # nothing loaded from elsewhere
    assert page.count("<script>") == 1 and "<script src" not in page
    hrefs = set(re.findall(r'href="([^"]*)"', page))
    assert all(h.startswith("#") or h == "check-by-ear.flac" for h in hrefs), hrefs
    assert page.count("<svg") == 2 and "<title>" in page              # hover texts


def test_text_is_escaped(written):
    page = _page(written)
    assert "&lt;ff&gt; &amp; co" in page and "<ff>" not in page
    assert "Session &lt;7&gt; &amp; more" in page and "&lt;rit.&gt;" in page


def test_well_formed_and_sections(written):
    page = _page(written)

    class Check(HTMLParser):
        void = {"meta", "img", "br", "hr", "link", "path", "use", "rect", "stop"}

        def __init__(self):
            super().__init__()
            self.stack, self.h2 = [], []
            self._in_h2 = False

        def handle_starttag(self, tag, attrs):
            if tag not in self.void:
                self.stack.append(tag)
            self._in_h2 = tag == "h2"

        def handle_startendtag(self, tag, attrs):
            pass

        def handle_endtag(self, tag):
            if tag in self.void:
                return
            assert self.stack and self.stack[-1] == tag, (tag, self.stack[-3:])
            self.stack.pop()
            self._in_h2 = False

        def handle_data(self, data):
            if self._in_h2:
                self.h2.append(data)

    c = Check()
    c.feed(page)
    assert c.stack == []
    assert c.h2 == ["Check by ear", "Overview", "Pieces", "Clock sync", "Statistics", "Events",
                    "Physiology", "Warnings"]                       # the extra-section hook before the warnings
    assert 'id="piece-1"' in page
    assert "research tool, not a medical device" in page and "association, not cause" in page


def test_residuals_in_milliseconds(written):
    page = _page(written)
    assert "<th>residual (ms)</th>" in page and "0.360" in page      # 0.36 ms, not 0.000 s
    assert "largest residual (ms)" in page
    two = sync_section({"method": "marks", "offset_s": 1.0, "drift_ppm": 5.0,
                        "points": [{"recording_s": 1, "recorder_s": 2, "residual_s": 0.0},
                                   {"recording_s": 9, "recorder_s": 10, "residual_s": 0.0}]})
    assert "zero by construction" in two and "largest residual" not in two


def test_one_clock_in_the_tables(written):
    page = _page(written)
    for sec in ("Events", "Statistics", "Pieces"):        # the clock fit alone pairs the two clocks
        part = page.split(f"<h2>{sec}</h2>")[1].split("<h2>")[0]
        heads = re.findall(r"<th>([^<]*)</th>", part)
        assert "recording (s)" not in heads and "recording" not in heads, sec
    assert "onset (s)" in re.findall(r"<th>([^<]*)</th>", page.split("<h2>Events</h2>")[1])


def test_check_by_ear_comes_first_and_lists_places(written):
    page = _page(written)
    assert page.index("<h2>Check by ear</h2>") < page.index("<h2>Overview</h2>")
    sec = page.split("<h2>Check by ear</h2>")[1].split("<h2>")[0]
    assert "repeat skipped" in sec and "repeat taken" in sec and "poor match" in sec
    assert 'href="check-by-ear.flac"' in sec


def test_sync_points_become_a_table():
    page = report_html(title="t", figure_png=b"\x89PNG\r\n\x1a\n", summary={}, pieces=None, events=None,
                       stats=None, warnings=[],
                       sync={"offset_s": 2.0, "points": [{"recording_s": 1.0, "residual_s": 0.001},
                                                         {"recording_s": 250.0, "residual_s": -0.001}],
                             "warnings": []})
    assert "<th>recording (s)</th>" in page and "250.000" in page
    assert "{" not in page.split("<body>")[1]        # no Python repr leaks into the page
