"""``stimkit annotate``: the one-piece shortcut, clear failures and all-or-nothing outputs.

A one-piece recording is rendered here with the project's renderer (its ground truth is the
performance's note times); exit codes are the CLI contract of DESIGN.md (1 work failed, 2 bad
input, 130 interrupted is the shell convention 128 + SIGINT).
"""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import soundfile as sf

from stimkit.cli import main

ROOT = Path(__file__).resolve().parents[1]
SCORES = ROOT / "example_scores"
SHORT = SCORES / "kites-at-dusk.musicxml"
OTHER = SCORES / "lanterns-over-the-weir.musicxml"
LEAD_S = 3.0


@pytest.fixture(scope="module")
def one_piece(tmp_path_factory):
    from stimkit.render import render_score
    from stimkit.score.parse import load_score

    d = tmp_path_factory.mktemp("one")
    y, perf = render_score(load_score(SHORT), seed=7, sr=22050, start_s=LEAD_S)
    path = d / "one-piece.flac"
    sf.write(path, y, 22050, subtype="PCM_16")
    first = float(perf.notes["onset_s"].min())
    return path, first


def test_shortcut_one_piece_without_sync(one_piece, tmp_path, capsys):
    audio, first = one_piece
    out = tmp_path / "o"
    assert main(["annotate", "--score", str(SHORT), "--audio", str(audio), "-o", str(out)]) == 0
    said = capsys.readouterr().out
    assert "no sync given" in said
    ev = pd.read_csv(out / "one-piece_events.tsv", sep="\t", na_values=["n/a"], keep_default_na=False)
    piece = ev[ev.trial_type == "piece"].iloc[0]
    assert abs(piece.onset - first) <= 0.5          # task: piece start +-0.5 s
    # without sync, onset is recording time, and the sidecar says so
    np.testing.assert_allclose(ev.onset.dropna(), ev.recording.dropna(), atol=1e-6)
    side = json.loads((out / "one-piece_events.json").read_text())
    assert side["OnsetClock"]["Synchronized"] is False
    assert "recording" in side["OnsetClock"]["Description"]


def test_template_is_printed(capsys):
    assert main(["annotate", "--template"]) == 0
    text = capsys.readouterr().out
    assert "[[piece]]" in text and "[sync]" in text


def _session(tmp_path, audio, body: str) -> Path:
    p = tmp_path / "s.toml"
    p.write_text(f'recording = "{audio}"\noutput = "out"\n' + body)
    return p


def test_session_errors_listed_with_lines(tmp_path, capsys, one_piece):
    p = tmp_path / "bad.toml"
    p.write_text('recording = "nope.flac"\nfeature_rate_hz = "fast"\n[[piece]]\nscore = "gone.musicxml"\n')
    assert main(["annotate", str(p)]) == 2
    err = capsys.readouterr().err
    assert "3 problems" in err
    for ln in ("line 1:", "line 2:", "line 4:"):
        assert ln in err


def test_missing_score_is_bad_input(tmp_path, capsys, one_piece):
    assert main(["annotate", "--score", str(tmp_path / "none.musicxml"), "--audio", str(one_piece[0])]) == 2
    assert "score not found" in capsys.readouterr().err


def test_sync_mark_not_found_fails_clearly(tmp_path, capsys, one_piece):
    p = _session(tmp_path, one_piece[0], '[sync]\nfrequency_hz = 1000\nduration_s = 0.05\n'
                 'recorder_times_s = [10.0, 60.0]\n[[piece]]\n'
                 f'score = "{SHORT}"\n')
    assert main(["annotate", str(p)]) == 1
    err = capsys.readouterr().err
    assert "sync mark" in err and err.count("\n") == 1
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_piece_not_in_recording_fails_clearly(tmp_path, capsys, one_piece):
    p = _session(tmp_path, one_piece[0], f'[[piece]]\nscore = "{OTHER}"\n')
    assert main(["annotate", str(p)]) == 1
    err = capsys.readouterr().err
    # refused by the piece search ("not found") or, failing that, by the alignment's check
    assert "lanterns-over-the-weir" in err and ("not found" in err or "different piece" in err)
    assert err.count("\n") == 1


def test_interrupt_while_writing_leaves_nothing(tmp_path, one_piece, monkeypatch):
    # the interrupt arrives after the events, stim and beat files are staged
    import stimkit.report.html as html

    def boom(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(html, "write_report", boom)
    out = tmp_path / "o"
    assert main(["annotate", "--score", str(SHORT), "--audio", str(one_piece[0]), "-o", str(out)]) == 130
    assert not out.exists()  # no output, no temporary, and not even the folder it would have made


@pytest.mark.parametrize("sig", ["SIGTERM", "SIGHUP"])
def test_stop_signal_while_staging_leaves_nothing(tmp_path, one_piece, monkeypatch, capsys, sig):
    # a job scheduler's SIGTERM or a closed terminal's SIGHUP is handled like Ctrl-C; the exit code
    # is the shell's 128 + signal number (143 / 129, POSIX shell convention)
    import stimkit.report.html as html

    def stop(*a, **k):
        os.kill(os.getpid(), getattr(signal, sig))
        time.sleep(1)  # the handler raises in this frame before the sleep ends

    monkeypatch.setattr(html, "write_report", stop)
    out = tmp_path / "o"
    code = main(["annotate", "--score", str(SHORT), "--audio", str(one_piece[0]), "-o", str(out)])
    assert code == 128 + getattr(signal, sig)
    assert "no output was written" in capsys.readouterr().err
    assert not out.exists()
    assert signal.getsignal(getattr(signal, sig)) is signal.SIG_DFL  # handler given back


def test_signal_during_commit_is_held_and_told_truthfully(tmp_path, one_piece, monkeypatch, capsys):
    # SIGTERM arrives while the files are being moved into place: the commit finishes (the signal
    # is held back), so every file is whole and new, and the message must not claim otherwise
    import stimkit.export.tables as tables

    real, calls = os.replace, []

    def replace(a, b):
        calls.append(b)
        if len(calls) == 2:
            os.kill(os.getpid(), signal.SIGTERM)
        return real(a, b)

    monkeypatch.setattr(tables.os, "replace", replace)
    out = tmp_path / "o"
    assert main(["annotate", "--score", str(SHORT), "--audio", str(one_piece[0]), "-o", str(out)]) == 143
    err = capsys.readouterr().err
    assert "no output was written" not in err and "written completely" in err
    names = sorted(p.name for p in out.iterdir())
    assert "one-piece_events.tsv" in names and "report.html" in names
    assert not [n for n in names if n.startswith(".")]  # no staging folder left


#: The CLI in a child process that says "working" on stdout when the feature stage starts, so the
#: signal below arrives in the middle of the work, not during the imports, whatever the load.
_CHILD = """import sys
import stimkit.audio.pipeline as pipeline
import stimkit.cli as cli
real = pipeline.compute_features
def hooked(*a, **k):
    print("working", flush=True)
    return real(*a, **k)
pipeline.compute_features = hooked
sys.exit(cli.main(sys.argv[1:]))
"""


@pytest.mark.parametrize("sig", ["SIGINT", "SIGTERM"])
def test_signal_to_a_running_process_leaves_nothing(tmp_path, one_piece, sig):
    out = tmp_path / "o"
    cmd = [sys.executable, "-c", _CHILD, "annotate", "--score", str(SHORT), "--audio",
           str(one_piece[0]), "-o", str(out)]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=tmp_path, text=True)
    for line in proc.stdout:
        if line.strip() == "working":
            proc.send_signal(getattr(signal, sig))
            break
    _, err = proc.communicate(timeout=120)
    # 128 + signal number, the shell's code for a command stopped by a signal (130 / 143)
    assert proc.returncode == 128 + getattr(signal, sig), err
    assert "no output was written" in err
    assert not out.exists()


def test_plain_offset_shifts_every_time(tmp_path, one_piece):
    # REFERENCES.md clock sync: with no drift, onset = recording + offset
    p = _session(tmp_path, one_piece[0], f'[sync]\noffset_s = 2.5\n[[piece]]\nscore = "{SHORT}"\n')
    assert main(["annotate", str(p)]) == 0
    out = tmp_path / "out"
    ev = pd.read_csv(out / "one-piece_events.tsv", sep="\t", na_values=["n/a"], keep_default_na=False)
    np.testing.assert_allclose(ev.onset, ev.recording + 2.5, atol=2e-6)
    side = json.loads((out / "one-piece_stim.json").read_text())
    assert side["StartTime"] == pytest.approx(side["RecordingStartTime"] + 2.5, abs=1e-6)
    assert side["SamplingFrequency"] == pytest.approx(10.0)
    assert json.loads((out / "one-piece_events.json").read_text())["OnsetClock"]["Synchronized"] is True


def test_a_lost_interrupt_still_stops_before_the_commit(tmp_path, one_piece, monkeypatch):
    """A Ctrl-C whose KeyboardInterrupt is swallowed on its way up (Python ignores exceptions
    raised in finalizers) is still recorded, and the run stops before its outputs are committed:
    exit 130, nothing written."""
    import stimkit.audio.pipeline as pipeline
    from stimkit.errors import STOP_SIGNALS

    real = pipeline.compute_features

    def swallowed(*a, **k):
        STOP_SIGNALS.append(int(signal.SIGINT))        # the handler ran; its exception got lost
        return real(*a, **k)

    monkeypatch.setattr(pipeline, "compute_features", swallowed)
    out = tmp_path / "o"
    code = main(["annotate", "--score", str(SHORT), "--audio", str(one_piece[0]), "-o", str(out)])
    assert code == 130
    assert not out.exists() or not any(out.rglob("*_events.tsv"))
    assert STOP_SIGNALS == []                           # cleared once the command is over
