"""The command line a researcher meets: plain help, ``python -m stimkit``, stage lines in pipes,
the ``annotate`` shortcut's options, one feature-rate default, ``[bids] run`` validation.

Exit codes are the project's CLI contract (DESIGN.md: 0 ok, 1 work failed, 2 bad input). The
BIDS run entity is ``run-<index>`` with a non-negative integer index (BIDS specification 1.11,
"Entities" table).
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

import stimkit
from stimkit import cli
from stimkit.cli import main
from stimkit.errors import InputError
from stimkit.session import DEFAULT_FEATURE_RATE_HZ, SessionFileError, parse_session_text, session_from_files

VERBS = ["plan", "features", "align", "annotate", "demo"]


@pytest.mark.parametrize("verb", [None] + VERBS)
def test_help_shows_plain_metavars(verb, capsys):
    argv = ([verb] if verb else []) + ["--help"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "Usage: stimkit" in out
    # no type names such as <bool>, <path>, <list[Path]>, <float>
    assert not re.search(r"<(bool|path|float|int|str|text|list\[[A-Za-z]+\])>", out, re.I), out
    assert "list[" not in out


def test_python_dash_m_runs_the_cli(tmp_path):
    root = Path(stimkit.__file__).resolve().parent.parent
    r = subprocess.run([sys.executable, "-m", "stimkit", "--version"], capture_output=True, text=True,
                       cwd=tmp_path, env={"PYTHONPATH": str(root), "PATH": ""}, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == f"stimkit {stimkit.__version__}"


def test_piped_progress_prints_one_line_per_finished_stage(capsys, monkeypatch):
    monkeypatch.setattr(cli, "_interactive", lambda: False)

    def work(*, progress):
        for task, frac in [("scores", 1.0), ("features", 0.3), ("features", 1.0), ("features", 1.0),
                           ("audio features", 0.5), ("audio features", 1.0),
                           ("audio features", 0.1), ("audio features", 1.0)]:
            progress(task, frac)
        return "ok"

    assert cli._with_progress(work) == "ok"
    lines = capsys.readouterr().out.strip().splitlines()
    # a task reported again at 1.0 is the same stage; a task that starts again is a new one
    assert [ln.split(" done")[0] for ln in lines] == [
        "stimkit: scores", "stimkit: features", "stimkit: audio features", "stimkit: audio features"]


def test_one_feature_rate_default_for_features_and_annotate(tmp_path):
    from typer.main import get_command

    cmd = get_command(cli.app)
    rate = {p.name: p.default for p in cmd.commands["features"].params}["rate"]
    assert rate == DEFAULT_FEATURE_RATE_HZ
    (tmp_path / "r.wav").write_bytes(b"x")
    (tmp_path / "a.musicxml").write_text("<score-partwise/>")
    s = session_from_files([tmp_path / "a.musicxml"], tmp_path / "r.wav")
    assert s.rate_hz == DEFAULT_FEATURE_RATE_HZ
    text = f'recording = "r.wav"\n[[piece]]\nscore = "a.musicxml"\n'
    assert parse_session_text(text, base_dir=tmp_path).rate_hz == DEFAULT_FEATURE_RATE_HZ


@pytest.fixture()
def files(tmp_path):
    (tmp_path / "r.wav").write_bytes(b"x")  # only existence is checked before the run
    (tmp_path / "a.musicxml").write_text("<score-partwise/>")
    (tmp_path / "b.musicxml").write_text("<score-partwise/>")
    return tmp_path


def test_annotate_shortcut_passes_rate_anchor_force(files, monkeypatch, capsys):
    import stimkit.session as session

    seen = {}

    def fake(sess, *, progress=None, command=None):
        seen["session"], seen["command"] = sess, command
        return None

    monkeypatch.setattr(session, "annotate_session", fake)
    monkeypatch.setattr(session, "summary_lines", lambda result: ["fine"])
    rc = main(["annotate", "--score", str(files / "a.musicxml"), "--audio", str(files / "r.wav"),
               "--rate", "25", "--anchor", "3.2=14.5", "--anchor", "9@2=40", "--force",
               "-o", str(files / "out")])
    assert rc == 0, capsys.readouterr().err
    s = seen["session"]
    assert s.rate_hz == 25.0 and s.force is True
    assert s.pieces[0].anchors == ["3.2=14.5", "9@2=40"]
    assert "--force" in seen["command"] and "--anchor" in seen["command"]


@pytest.mark.parametrize("extra,needle", [
    (["--rate", "0"], "--rate"),
    (["--rate", "500"], "--rate"),
    (["--anchor", "bar three"], "--anchor"),
    (["--score", "{b}", "--anchor", "3=4.0"], "exactly one --score"),
])
def test_annotate_shortcut_refuses_bad_options_in_one_line(files, extra, needle, capsys):
    extra = [x.format(b=files / "b.musicxml") for x in extra]
    rc = main(["annotate", "--score", str(files / "a.musicxml"), "--audio", str(files / "r.wav"),
               "-o", str(files / "out"), *extra])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and needle in err[0]
    assert not (files / "out").exists()


def test_anchor_with_a_session_file_points_to_the_piece_table(files, capsys):
    p = files / "s.toml"
    p.write_text('recording = "r.wav"\n[[piece]]\nscore = "a.musicxml"\n')
    assert main(["annotate", str(p), "--anchor", "3=4"]) == 2
    assert "[[piece]]" in capsys.readouterr().err


@pytest.mark.parametrize("value,ok", [("1", True), ('"2"', True), ("0", True), ('"one"', False),
                                      ('"1a"', False), ("-1", False)])
def test_bids_run_must_be_an_index(files, value, ok):
    text = f'recording = "r.wav"\n\n[bids]\nsubject = "01"\nrun = {value}\n\n[[piece]]\nscore = "a.musicxml"\n'
    if ok:
        assert parse_session_text(text, base_dir=files).bids["run"] == value.strip('"')
        return
    with pytest.raises(SessionFileError) as err:
        parse_session_text(text, base_dir=files)
    assert "line 5:" in str(err.value) and "run" in str(err.value)   # line of `run = ...` above


def test_plan_kinds_unknown_is_refused(files, capsys):
    assert main(["plan", str(files / "a.musicxml"), "--kinds", "dynamic,loudness", "-o",
                 str(files / "out")]) == 2
    err = capsys.readouterr().err
    assert "loudness" in err and "dynamic" in err
    with pytest.raises(InputError):
        from stimkit.report.cuesheet import parse_kinds

        parse_kinds(" , ")
