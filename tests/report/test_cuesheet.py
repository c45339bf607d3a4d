"""The cue sheet reads like a part: real changes only, beats as players count them, same-moment
rows in reading order, plain-language remarks, a filter by kind, a header that names its columns.

External material: music21 corpus scores used in place (facts from REFERENCES.md):
``schubert/Lindenbaum.xml`` (3/4, key change at bar 25 after a double bar ending bar 24),
``schumann_clara/polonaise_op1n4.mxl`` (repeats: 40 printed bars played as 80),
``beach/prayer_of_a_tired_child.musicxml`` (4/4, marks on half beats).
"""

from __future__ import annotations

import html
import re

import pandas as pd
import pytest
from music21 import corpus

from stimkit.report.cuesheet import beat_text, change_text, cue_sheet_html, plain_remarks
from stimkit.score.plan import make_plan


def _rows(page: str):
    """Per table: (header cells, list of row cells) as plain text."""
    out = []
    for tab in re.findall(r"<table>(.*?)</table>", page, re.S):
        head = [html.unescape(h) for h in re.findall(r"<th>(.*?)</th>", tab)]
        rows = [[html.unescape(re.sub(r"<[^>]+>", "", c)) for c in re.findall(r"<td[^>]*>(.*?)</td>", tr)]
                for tr in re.findall(r"<tr class=[^>]*>(.*?)</tr>", tab, re.S)]
        out.append((head, rows))
    return out


@pytest.fixture(scope="module")
def plans(tmp_path_factory):
    out = tmp_path_factory.mktemp("cue")
    works = {"linden": "schubert/Lindenbaum.xml", "polonaise": "schumann_clara/polonaise_op1n4.mxl",
             "prayer": "beach/prayer_of_a_tired_child.musicxml"}
    res = {}
    for key, w in works.items():
        r = make_plan([corpus.getWork(w)], out_dir=out / key)
        res[key] = (r, (out / key / "cue-sheet.html").read_text("utf-8"))
    return res


def test_beat_text_fractions_players_use():
    assert beat_text(1.0) == "1"
    assert beat_text(2.5) == "2\u00bd"
    assert beat_text(1.25) == "1\u00bc" and beat_text(3.75) == "3\u00be"
    assert beat_text(1 + 1 / 3) == "1\u2153" and beat_text(2 + 2 / 3) == "2\u2154"
    assert beat_text(1.53) == "between 1 and 2"          # no 1.53 on a cue sheet
    assert beat_text(5.0, last_beat=4.0) == "end"         # 4/4: a mark on the closing barline
    assert beat_text(4.5, last_beat=4.0) == "4\u00bd"


def test_no_change_that_is_no_change(plans):
    for key, (_, page) in plans.items():
        for _, rows in _rows(page):
            for cells in rows:
                m = re.match(r"^(.+?) \u2192 (.+)$", cells[-1])
                assert not (m and m.group(1) == m.group(2)), (key, cells)
    # polonaise: the repeat restates its opening dynamic; it is left out (kept in the table)
    r, page = plans["polonaise"]
    tab = r.tables[r.names[0]]
    texts = change_text(tab)
    assert any(t is None for t, k in zip(texts, tab["trial_type"]) if k == "dynamic")


def test_beats_are_musicians_beats(plans):
    for key, (_, page) in plans.items():
        for head, rows in _rows(page):
            i = head.index("beat")
            for cells in rows:
                assert re.fullmatch(r"\d+[\u00bc-\u00be\u2150-\u215e]?|end|between \d+ and \d+", cells[i]), (key, cells)
    head, rows = _rows(plans["prayer"][1])[0]
    assert any(c[head.index("beat")].endswith("\u00bd") for c in rows)   # marks on half beats


def test_same_moment_rows_in_reading_order(plans):
    head, rows = _rows(plans["linden"][1])[0]
    bar, kind, what = head.index("bar"), head.index("kind"), head.index("what changes")
    at25 = [i for i, c in enumerate(rows) if c[kind] == "key" and c[bar] == "25"]
    end24 = [i for i, c in enumerate(rows) if c[bar] == "24" and c[what] == "double bar"]
    assert at25 and end24 and end24[0] < at25[0]     # the barline closing bar 24 is read first
    assert rows[end24[0]][head.index("beat")] == "end"


def test_header_names_the_columns_shown(plans):
    for key, (_, page) in plans.items():
        for head, rows in _rows(page):
            assert head[0] == "\u2713" and all(h for h in head)
            assert all(len(c) == len(head) for c in rows)
    assert "pass" in _rows(plans["polonaise"][1])[0][0]      # bars played twice
    assert "pass" not in _rows(plans["linden"][1])[0][0]
    assert "programme" not in _rows(plans["linden"][1])[0][0]  # one piece


def test_kinds_filter_keeps_changes_across_hidden_rows(plans, tmp_path):
    r, _ = plans["prayer"]
    page = cue_sheet_html(models=r.models, names=r.names, tables=r.tables, programme=r.programme,
                          gap_s=30.0, kinds=["dynamic"])
    head, rows = _rows(page)[0]
    assert {c[head.index("kind")] for c in rows} == {"dynamic"}
    assert "showing only dynamic" in page


def test_raw_library_warnings_are_counted_not_shown(plans):
    r, _ = plans["linden"]
    m = r.models[0]
    raw = "music21.exceptions21.StreamException: <music21.stream.Measure 96 offset=0.0> is overfull"
    plain = "bar 96 of Violin II is longer than its time signature"
    assert plain_remarks([raw, plain]) == ([plain], 1)
    m2 = type(m)(**{**m.__dict__, "warnings": [raw, plain]})
    page = cue_sheet_html(models=[m2], names=r.names, tables=r.tables, programme=r.programme, gap_s=0.0)
    assert plain in page and "music21" not in page and "StreamException" not in page
    assert "1 further remark from reading the score file" in page
