"""The HTML report: self-contained, escaped, deterministic."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import pytest

from stimkit.export.tables import OutputSet
from stimkit.report.figure import figure_png, overview_figure
from stimkit.report.html import write_report
from stimkit.stats.changes import change_points
from stimkit.stats.coincidence import boundary_coincidence
from stimkit.stats.windows import piece_summary


@pytest.fixture(scope="module")
def written(session, tmp_path_factory):
    png = figure_png(overview_figure(features=session["features"], units=session["units"],
                                     events=session["events"], pieces=session["pieces"]))
    stats = {
        "Feature change points": change_points(session["features"]),
        "Boundaries near change points": boundary_coincidence([10.0, 100.0], [10.5, 50.0]),
    }
    kw = dict(title="Session <7> & more", figure_png=png, summary={"pieces": 2, "duration_s": 300.0},
              pieces=piece_summary(session["features"], session["pieces"]), events=session["events"],
              stats=stats, warnings=["bar 12 <rit.> not aligned"],
              sync={"offset_s": 1.25, "drift_ppm": 31.0, "residuals_ms": [0.4, -0.4]})
    dirs = []
    for name in ("a", "b"):
        out = tmp_path_factory.mktemp(name)
        with OutputSet(out) as outs:
            paths = write_report(outs, **kw)
        dirs.append(out)
    return dirs, paths, png


def test_files_and_rerun(written):
    (a, b), paths, png = written
    assert [p.name for p in paths] == ["report.png", "report.html"]
    assert (a / "report.png").read_bytes() == png
    for name in ("report.png", "report.html"):
        assert (a / name).read_bytes() == (b / name).read_bytes()  # byte-identical rerun


def test_self_contained(written):
    (a, _), _, png = written
    page = (a / "report.html").read_text("utf-8")
    assert "http://" not in page and "https://" not in page
    assert "<script" not in page.lower() and "url(" not in page and "@import" not in page
    srcs = re.findall(r'src="([^"]*)"', page)
    assert len(srcs) == 1 and srcs[0].startswith("data:image/png;base64,")
    assert base64.b64decode(srcs[0].split(",", 1)[1]) == png   # the embedded image is the PNG


def test_text_is_escaped(written):
    (a, _), _, _ = written
    page = (a / "report.html").read_text("utf-8")
    assert "&lt;ff&gt; &amp; co" in page and "<ff>" not in page
    assert "Session &lt;7&gt; &amp; more" in page
    assert "&lt;rit.&gt;" in page


def test_well_formed_and_sections(written):
    (a, _), _, _ = written
    page = (a / "report.html").read_text("utf-8")

    class Check(HTMLParser):
        void = {"meta", "img", "br", "hr", "link"}

        def __init__(self):
            super().__init__()
            self.stack, self.h2 = [], []
            self._in_h2 = False

        def handle_starttag(self, tag, attrs):
            if tag not in self.void:
                self.stack.append(tag)
            self._in_h2 = tag == "h2"

        def handle_endtag(self, tag):
            assert self.stack and self.stack[-1] == tag, (tag, self.stack[-3:])
            self.stack.pop()
            self._in_h2 = False

        def handle_data(self, data):
            if self._in_h2:
                self.h2.append(data)

    c = Check()
    c.feed(page)
    assert c.stack == []
    assert c.h2 == ["Overview", "Pieces", "Clock sync", "Statistics", "Events", "Warnings"]
    assert "31.000" in page and "drift (ppm)" in page   # the sync fit is listed


def test_sync_points_become_a_table(tmp_path):
    from stimkit.report.html import report_html

    page = report_html(title="t", figure_png=b"\x89PNG\r\n\x1a\n", summary={}, pieces=None, events=None,
                       stats=None, warnings=[],
                       sync={"offset_s": 2.0, "points": [{"recording_s": 1.0, "residual_s": 0.001},
                                                         {"recording_s": 250.0, "residual_s": -0.001}],
                             "warnings": []})
    assert "<th>recording (s)</th>" in page and "250.000" in page
    assert "{" not in page.split("<body>")[1]        # no Python repr leaks into the page
