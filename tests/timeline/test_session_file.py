"""The session file: parsing, validation with line numbers, the starter template.

TOML syntax per the TOML 1.0 specification (Python's tomllib is the reference parser); the
line numbers asserted are the lines of the texts written in each test.
"""

import tomllib
from pathlib import Path

import pytest

from stimkit.errors import InputError
from stimkit.session import (
    SessionFileError, key_lines, load_session, parse_session_text, session_from_files, template_text,
)


@pytest.fixture()
def folder(tmp_path):
    (tmp_path / "rec.flac").write_bytes(b"not really audio")  # only existence is checked here
    (tmp_path / "a.musicxml").write_text("<score-partwise/>")
    (tmp_path / "b.mxl").write_bytes(b"zip")
    (tmp_path / "sync.tsv").write_text("onset\n1\n2\n")
    return tmp_path


GOOD = """\
recording = "rec.flac"
output = "out"
feature_rate_hz = 20

[bids]
subject = "01"
task = "music"
run = 2

[sync]
frequency_hz = 2000
duration_s = 0.02
recorder_file = "sync.tsv"
recorder_column = "onset"

[[piece]]
score = "a.musicxml"
start_s = 10

[[piece]]
score = "b.mxl"
name = "second"
anchors = ["12.3=61.5", "20=90"]
"""


def test_good_session_is_read_with_paths_relative_to_the_file(folder):
    path = folder / "s.toml"
    path.write_text(GOOD)
    s = load_session(path)
    assert s.recording == folder / "rec.flac"
    assert s.out_dir == folder / "out"
    assert s.rate_hz == 20.0
    assert s.bids == {"subject": "01", "task": "music", "run": "2"}
    assert s.sync.mode == "marks" and s.sync.recorder_file == folder / "sync.tsv"
    assert [p.name for p in s.pieces] == ["a", "second"]
    assert s.pieces[0].start_s == 10.0 and s.pieces[1].anchors == ["12.3=61.5", "20=90"]
    assert load_session(path, out_dir="elsewhere").out_dir == Path("elsewhere")


def test_every_problem_is_listed_with_its_line(folder):
    text = (
        'recording = "missing.flac"\n'      # 1: file not found
        'feature_rate_hz = 0\n'             # 2: out of range
        'colour = "red"\n'                  # 3: unknown key
        '[bids]\n'
        'subject = "0_1"\n'                 # 5: not a BIDS label
        '[sync]\n'
        'frequency_hz = 1000\n'
        'duration_s = 0.02\n'
        'recorder_times_s = [5.0, 2.0]\n'   # 9: not increasing
        '[[piece]]\n'
        'score = "nothere.xml"\n'           # 11: not found
        '[[piece]]\n'
        'score = "a.musicxml"\n'
        'anchors = ["bar 3"]\n'             # 14: bad anchor
    )
    with pytest.raises(SessionFileError) as ei:
        parse_session_text(text, base_dir=folder, source=folder / "s.toml")
    err = ei.value
    assert isinstance(err, InputError) and err.exit_code == 2
    lines = sorted(ln for ln, _ in err.problems)
    assert lines == [1, 2, 3, 5, 9, 11, 14]
    msg = str(err).splitlines()
    assert msg[0].endswith("7 problems in the session file; fix them and rerun:")
    assert msg[1].startswith("  line 1:") and "missing.flac" in msg[1]


def test_missing_essentials(folder):
    with pytest.raises(SessionFileError) as ei:
        parse_session_text("[sync]\noffset_s = 'x'\n", base_dir=folder)
    text = str(ei.value)
    assert "recording" in text and "no pieces" in text and "line 2" in text


def test_toml_syntax_error_names_the_line(folder):
    with pytest.raises(InputError, match="line 2"):
        parse_session_text('recording = "rec.flac"\nrun = = 3\n', base_dir=folder, source=folder / "s.toml")


def test_offset_sync_and_no_sync(folder):
    base = 'recording = "rec.flac"\n[[piece]]\nscore = "a.musicxml"\n'
    assert parse_session_text(base, base_dir=folder).sync.mode == "none"
    s = parse_session_text(base + "[sync]\noffset_s = -2.5\n", base_dir=folder)
    assert s.sync.mode == "offset" and s.sync.offset_s == -2.5


def test_key_line_index_matches_tomllib():
    # every key tomllib reads from the template is found by the line index on a line that
    # really starts with that key
    text = template_text()
    data = tomllib.loads(text)
    idx = key_lines(text)
    lines = text.splitlines()
    assert data.get("piece"), "the template lists at least one piece"  # else the loop below is empty
    checked = 0
    for key in data:
        if isinstance(data[key], (dict, list)):
            continue
        ln = idx[("", 0, key)]
        assert lines[ln - 1].lstrip().startswith(key)
        checked += 1
    assert checked >= 2                              # recording and output at least
    for i, piece in enumerate(data["piece"]):
        for key in piece:
            assert lines[idx[("piece", i, key)] - 1].lstrip().startswith(key)


def test_template_parses_and_only_misses_the_example_files(folder):
    with pytest.raises(SessionFileError) as ei:
        parse_session_text(template_text(), base_dir=folder)
    # the template itself is valid: the only problems are its example file names
    problems = ei.value.problems
    assert problems and all("not found" in msg for _, msg in problems)


def test_shortcut(folder):
    s = session_from_files([folder / "a.musicxml"], folder / "rec.flac", out_dir=folder / "o")
    assert s.sync.mode == "none" and [p.name for p in s.pieces] == ["a"]
    with pytest.raises(InputError, match="score not found"):
        session_from_files([folder / "zzz.musicxml"], folder / "rec.flac")
