"""The study file: every problem at once with its line number, the template, the CLI's exit codes.

Exit codes are the CLI contract of DESIGN.md (2 bad input). TOML is read with the standard
library's tomllib; the expected line numbers are counted in the texts below.
"""

import re
import tomllib
from pathlib import Path

import pytest

from stimkit.cli import main
from stimkit.study.studyfile import StudyFileError, load_study, template_text, toml_lines


def _touch(folder: Path, *names):
    for n in names:
        p = folder / n
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"x")


def test_template_is_valid_toml_and_loads_once_its_files_exist(tmp_path):
    text = template_text()
    data = tomllib.loads(text)
    assert data["performance"][0]["piece"][0]["score"].endswith(".musicxml")
    (tmp_path / "study.toml").write_text(text)
    _touch(tmp_path, "recordings/concert-1.flac", "scores/first-piece.musicxml", "scores/second-piece.musicxml",
           "physio/sub-01_ses-1_physio.tsv.gz", "physio/sub-02_ses-1_beats.tsv")
    st = load_study(tmp_path / "study.toml")
    assert [s.name for s in st.sessions] == ["sub-01_ses-1", "sub-02_ses-1"]
    assert st.sessions[0].sync.mode == "marks" and st.sessions[1].sync.mode == "offset"
    assert st.participants[0] == {"participant_id": "sub-01", "age": 54, "group": "patient"}
    assert st.show(st.sessions[0].physio[0].file) == "physio/sub-01_ses-1_physio.tsv.gz"


def test_template_is_printed(capsys):
    assert main(["study", "--template"]) == 0
    assert capsys.readouterr().out == template_text()


BAD = '''\
name = "x"
colour = "blue"
workers = 0
[analysis]
surrogates = 5
[[performance]]
id = "a"
recording = "missing.flac"
[[performance.piece]]
score = "s.musicxml"
anchors = ["bar 3"]
[[participant]]
id = "01"
[[participant]]
id = "0-2"
[[session]]
participant = "01"
session = "1"
performance = "b"
[[session]]
participant = "03"
session = "1"
performance = "a"
[session.sync]
offset_s = "soon"
[[session.physio]]
file = "nothere.tsv"
'''


def test_every_problem_is_reported_with_its_line(tmp_path):
    _touch(tmp_path, "s.musicxml")
    f = tmp_path / "study.toml"
    f.write_text(BAD)
    with pytest.raises(StudyFileError) as err:
        load_study(f)
    lines = {ln: msg for ln, msg in err.value.problems}
    expect = {2: "unknown key 'colour'", 3: "'workers'", 5: "surrogates", 8: "missing.flac",
              11: "anchor 'bar 3'", 15: "id must be a BIDS label", 19: "performance 'b'",
              21: "participant '03'", 25: "offset_s", 27: "nothere.tsv"}
    for ln, text in expect.items():
        assert ln in lines and text in lines[ln], (ln, lines.get(ln))
    assert len(err.value.problems) == len(expect)
    # the message is one block: a head line and one line per problem
    assert str(err.value).count("\n") == len(expect)


def test_bad_study_file_exits_2_and_writes_nothing(tmp_path, capsys):
    _touch(tmp_path, "s.musicxml")
    f = tmp_path / "study.toml"
    f.write_text(BAD)
    assert main(["study", str(f), "-o", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "10 problems in the study file" in err and "line 27" in err
    assert not (tmp_path / "out").exists()


def test_no_file_and_bad_toml(tmp_path, capsys):
    assert main(["study", str(tmp_path / "none.toml")]) == 2
    assert "study file not found" in capsys.readouterr().err
    (tmp_path / "x.toml").write_text("name = ")
    assert main(["study", str(tmp_path / "x.toml")]) == 2
    assert "not valid TOML" in capsys.readouterr().err


def test_line_index_follows_nested_array_tables():
    text = "[[session]]\na = 1\n[session.sync]\nb = 2\n[[session.physio]]\nc = 3\n[[session]]\n" \
           "[[session.physio]]\nc = 4\n[[session.physio]]\nc = 5\n"
    ln = toml_lines(text)
    assert ln[("session", 0, "a")] == 2
    assert ln[("session", 0, "sync", "b")] == 4
    assert ln[("session", 0, "physio", 0, "c")] == 6
    assert ln[("session", 1, "physio", 0, "c")] == 9
    assert ln[("session", 1, "physio", 1, "c")] == 11


def test_session_labels_and_duplicates(tmp_path):
    _touch(tmp_path, "r.flac", "s.musicxml")
    f = tmp_path / "study.toml"
    f.write_text('[[performance]]\nid = "a"\nrecording = "r.flac"\n[[performance.piece]]\nscore = "s.musicxml"\n'
                 '[[participant]]\nid = "01"\n'
                 '[[session]]\nparticipant = "01"\nsession = "1"\nperformance = "a"\n'
                 '[[session]]\nparticipant = "01"\nsession = 1\nperformance = "a"\n')
    with pytest.raises(StudyFileError) as err:
        load_study(f)
    assert re.search(r"line 12: .*same participant, session, task and run", str(err.value))


def test_a_session_file_gives_recording_pieces_clock_and_its_participants_physiology(tmp_path):
    _touch(tmp_path, "r.flac", "s.musicxml", "a.tsv", "b.tsv")
    (tmp_path / "day1.toml").write_text(
        'recording = "r.flac"\n[sync]\noffset_s = 4.5\n[[piece]]\nscore = "s.musicxml"\n'
        '[[physio]]\nfile = "a.tsv"\nparticipant = "01"\n[[physio]]\nfile = "b.tsv"\nparticipant = "02"\n')
    (tmp_path / "study.toml").write_text(
        '[[participant]]\nid = "01"\n[[participant]]\nid = "02"\n'
        '[[session]]\nparticipant = "01"\nsession = "1"\nsession_file = "day1.toml"\n'
        '[[session]]\nparticipant = "02"\nsession = "1"\nsession_file = "day1.toml"\n')
    st = load_study(tmp_path / "study.toml")
    assert len(st.performances) == 1                      # one session file, one performance
    a, b = st.sessions
    assert a.sync.offset_s == 4.5 and a.performance == b.performance == "day1"
    assert [p.file.name for p in a.physio] == ["a.tsv"] and [p.file.name for p in b.physio] == ["b.tsv"]
