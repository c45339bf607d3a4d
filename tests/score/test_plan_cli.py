"""``stimkit plan`` through the CLI: outputs, determinism, and one-line refusals of bad input.

Exit codes and the one-line error are the project's CLI contract (DESIGN.md: 2 = bad input).
The entity bomb is the classic "billion laughs" document (nested entity expansion), which XML
parsers must refuse (OWASP XML security guidance; defusedxml).
"""

from __future__ import annotations

import json
import os
import sys
import zipfile
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from xmlfix import attributes, bars_of, metronome, measure, rest, score, write  # noqa: E402

from stimkit.cli import main  # noqa: E402
from stimkit.score.plan import PLAN_COLUMNS, make_plan  # noqa: E402

A34 = attributes(beats=3, beat_type=4, fifths=0)


def good_score(tmp_path, name="small.musicxml", bpm=96):
    return write(tmp_path, name, score([("P", bars_of(8, first_attrs=A34 + metronome("quarter", bpm),
                                                       per_bar=3))]))


def run(argv, capsys):
    rc = main(argv)
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def assert_refused(rc, err, out_dir: Path):
    assert rc == 2
    lines = [ln for ln in err.strip().splitlines() if ln]
    assert len(lines) == 1 and lines[0].startswith("stimkit: error:")
    assert not out_dir.exists() or not any(out_dir.iterdir())  # nothing written


def test_plan_two_pieces_writes_everything(tmp_path, capsys):
    a, b = good_score(tmp_path, "one.musicxml"), good_score(tmp_path, "two.musicxml", bpm=120)
    out = tmp_path / "out"
    rc, stdout, err = run(["plan", str(a), str(b), "-o", str(out), "--gap", "10"], capsys)
    assert rc == 0, err
    names = sorted(p.name for p in out.iterdir())
    assert names == ["cue-sheet.html", "one.boundaries.json", "one.boundaries.tsv", "programme.json",
                     "programme.tsv", "two.boundaries.json", "two.boundaries.tsv"]
    head = (out / "one.boundaries.tsv").read_text().splitlines()[0].split("\t")
    assert head == PLAN_COLUMNS
    side = json.loads((out / "one.boundaries.json").read_text())
    assert set(side["Columns"]) == set(PLAN_COLUMNS)  # every column described
    assert side["TempoMap"]["from"] == "score_qn" and side["TempoMap"]["to"] == "nominal"
    prog = (out / "programme.tsv").read_text().splitlines()
    # 24 quarters at 96 = 15 s; second piece starts after a 10 s gap (hand computed)
    assert prog[2].split("\t")[2] == "25.000"
    html = (out / "cue-sheet.html").read_text()
    assert html.startswith("<!DOCTYPE html>") and "two" in html and "<script" not in html


def test_plan_is_byte_identical(tmp_path):
    a = good_score(tmp_path)
    r1 = make_plan([a], out_dir=tmp_path / "o1")
    r2 = make_plan([a], out_dir=tmp_path / "o2")
    assert [p.name for p in r1.written] == [p.name for p in r2.written]
    for p, q in zip(r1.written, r2.written):
        assert p.read_bytes() == q.read_bytes()
    assert (tmp_path / "o1" / "cue-sheet.html").exists()  # cue sheet for a single score too


def test_missing_file(tmp_path, capsys):
    rc, _, err = run(["plan", str(tmp_path / "nope.musicxml"), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "not found" in err


def test_wrong_extension(tmp_path, capsys):
    p = write(tmp_path, "score.pdf", "hello")
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "extension" in err


def test_not_xml(tmp_path, capsys):
    p = write(tmp_path, "score.musicxml", "just some text\n")
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")


def test_malformed_xml(tmp_path, capsys):
    text = score([("P", bars_of(2, first_attrs=A34, per_bar=3))])
    p = write(tmp_path, "cut.musicxml", text[: len(text) // 2])
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "malformed XML" in err


def test_entity_bomb_refused(tmp_path, capsys):
    ents = '<!ENTITY lol "lol">' + "".join(
        f'<!ENTITY lol{i} "{("&lol" + (str(i - 1) if i > 1 else "") + ";") * 10}">' for i in range(1, 10))
    doctype = f"<!DOCTYPE score-partwise [{ents}]>"
    text = score([("P&lol9;", bars_of(2, first_attrs=A34, per_bar=3))], doctype=doctype)
    p = write(tmp_path, "bomb.musicxml", text)
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "entit" in err


def test_entity_bomb_inside_mxl_refused(tmp_path, capsys):
    ents = '<!ENTITY a "aaaaaaaaaa"><!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;&a;&a;">'
    text = score([("P&b;", bars_of(2, first_attrs=A34, per_bar=3))],
                 doctype=f"<!DOCTYPE score-partwise [{ents}]>")
    p = tmp_path / "bomb.mxl"
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("score.musicxml", text)
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")


def test_public_doctype_without_entities_is_fine(tmp_path):
    # the usual MusicXML DOCTYPE (public DTD reference, no entity declarations) must load
    dt = ('<!DOCTYPE score-partwise PUBLIC "-//Recordare//DTD MusicXML 4.0 Partwise//EN" '
          '"http://www.musicxml.org/dtds/partwise.dtd">\n')
    p = write(tmp_path, "dt.musicxml", score([("P", bars_of(2, first_attrs=A34, per_bar=3))], doctype=dt))
    r = make_plan([p], out_dir=tmp_path / "o")
    assert len(r.models[0].notes) == 6


def test_score_without_notes(tmp_path, capsys):
    ms = [measure(1, A34 + rest(3)), measure(2, rest(3))]
    p = write(tmp_path, "empty.musicxml", score([("P", ms)]))
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "no pitched notes" in err


@pytest.mark.parametrize("bpm", [0, -60])
def test_zero_or_negative_tempo(tmp_path, capsys, bpm):
    p = good_score(tmp_path, f"t{abs(bpm)}.musicxml", bpm=bpm)
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert "positive" in err


def test_one_bad_score_among_good_writes_nothing(tmp_path, capsys):
    a = good_score(tmp_path)
    bad = write(tmp_path, "bad.musicxml", "<score-partwise><part-list>")
    rc, _, err = run(["plan", str(a), str(bad), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")


def test_output_folder_is_a_file(tmp_path, capsys):
    a = good_score(tmp_path)
    f = write(tmp_path, "occupied", "x")
    rc, _, err = run(["plan", str(a), "-o", str(f)], capsys)
    assert rc == 2 and len(err.strip().splitlines()) == 1
    rc, _, err = run(["plan", str(a), "-o", str(f / "sub")], capsys)
    assert rc == 2 and len(err.strip().splitlines()) == 1


@pytest.mark.skipif(os.name != "posix", reason="POSIX folder permissions")
def test_unwritable_output_folder(tmp_path, capsys):
    a = good_score(tmp_path)
    if os.geteuid() != 0:
        out = tmp_path / "locked"
        out.mkdir()
        out.chmod(0o500)
        try:
            rc, _, err = run(["plan", str(a), "-o", str(out)], capsys)
        finally:
            out.chmod(0o700)
        assert_refused(rc, err, out)
        return
    # root ignores folder permissions; /proc/self is an existing folder that refuses new files
    # even for root (Linux procfs), so the check still runs here
    out = Path("/proc/self")
    if not out.is_dir():
        pytest.skip("needs Linux /proc")
    rc, _, err = run(["plan", str(a), "-o", str(out)], capsys)
    assert rc == 2 and len(err.strip().splitlines()) == 1 and err.startswith("stimkit: error:")
    assert not [p for p in os.listdir(out) if p.endswith((".tsv", ".json", ".html", ".part"))]


def test_negative_gap_refused(tmp_path, capsys):
    a = good_score(tmp_path)
    rc, _, err = run(["plan", str(a), "-o", str(tmp_path / "o"), "--gap", "-5"], capsys)
    assert_refused(rc, err, tmp_path / "o")


def test_utf16_and_bom_musicxml_load(tmp_path):
    text = score([("P", bars_of(2, first_attrs=A34, per_bar=3))])
    p16 = tmp_path / "u16.musicxml"
    p16.write_bytes(text.replace('encoding="UTF-8"', 'encoding="UTF-16"').encode("utf-16"))
    p8 = tmp_path / "bom.musicxml"
    p8.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    r = make_plan([p16, p8], out_dir=tmp_path / "o")
    assert [len(m.notes) for m in r.models] == [6, 6]


def test_zip_with_xml_extension_refused(tmp_path, capsys):
    p = tmp_path / "zipped.musicxml"
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("score.musicxml", "<score-partwise/>")
    rc, _, err = run(["plan", str(p), "-o", str(tmp_path / "o")], capsys)
    assert_refused(rc, err, tmp_path / "o")
    assert ".mxl" in err


@pytest.mark.skipif(not Path("/proc/self").exists(), reason="needs Linux /proc")
def test_output_folder_that_cannot_be_created(tmp_path, capsys):
    # /proc refuses new folders even for root (Linux procfs), so this works where chmod cannot
    a = good_score(tmp_path)
    out = Path("/proc/stimkit-no-such-folder")
    rc, _, err = run(["plan", str(a), "-o", str(out)], capsys)
    assert rc == 2 and len(err.strip().splitlines()) == 1
    assert not out.exists()


def test_disk_full_leaves_no_new_output_folder(tmp_path, monkeypatch, capsys):
    # ENOSPC while the files are staged: one line, exit 1 (DESIGN.md: the machine failed, not the
    # input), and not even the output folder the run would have made is left behind
    import builtins
    import errno

    p = good_score(tmp_path)
    real_open = builtins.open

    def full(path, mode="r", *a, **k):
        if "w" in mode and str(path).endswith(".new"):
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real_open(path, mode, *a, **k)

    monkeypatch.setattr(builtins, "open", full)
    out = tmp_path / "new" / "plan"
    assert main(["plan", str(p), "-o", str(out)]) == 1
    monkeypatch.undo()
    err = capsys.readouterr().err.strip()
    assert "no space left" in err and "\n" not in err
    assert not (tmp_path / "new").exists()
