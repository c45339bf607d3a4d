"""All-or-nothing output sets: faults injected into the commit, inputs never overwritten, stale
temporaries swept, operating-system errors told in one line.

The faults are injected by monkeypatching the rename the commit uses (``os.replace`` in
:mod:`stimkit.export.tables`) and the file opening of the staging step; the rule checked is the
project's contract (DESIGN.md, "Writes are atomic"; the brief: "outputs are all-or-nothing",
"inputs are never overwritten").
"""

from __future__ import annotations

import errno
import os
import subprocess
import sys

import pytest

import stimkit.export.tables as tables
from stimkit.errors import InputError, WorkFailed
from stimkit.export.tables import OutputSet, protect_inputs, sweep_stale

NAMES = ["a_events.tsv", "a_events.json", "sub/dir/a_stim.json", "report.html"]


def _previous_run(out):
    with OutputSet(out) as outs:
        for n in NAMES:
            outs.write_text(n, f"old {n}\n")
    return {n: (out / n).read_text() for n in NAMES}


def _state(out):
    """Every file under ``out`` (hidden ones included) with its text."""
    return {str(p.relative_to(out)): p.read_text() for p in sorted(out.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("fail_at", [1, 2, 4])
def test_rename_fault_rolls_back_every_file(tmp_path, monkeypatch, fail_at):
    out = tmp_path / "out"
    old = _previous_run(out)
    real, calls = os.replace, []

    def replace(a, b):
        calls.append(b)
        if len(calls) == fail_at:
            raise OSError(errno.EIO, "Input/output error")
        return real(a, b)

    monkeypatch.setattr(tables.os, "replace", replace)
    with pytest.raises(WorkFailed, match="nothing was written"):
        with OutputSet(out) as outs:
            for n in NAMES:
                outs.write_text(n, f"new {n}\n")
    assert _state(out) == old        # every earlier file back, no new one, no temporary left


def test_interrupt_during_commit_rolls_back(tmp_path, monkeypatch):
    out = tmp_path / "out"
    old = _previous_run(out)
    real, calls = os.replace, []

    def replace(a, b):
        calls.append(b)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(a, b)

    monkeypatch.setattr(tables.os, "replace", replace)
    with pytest.raises(KeyboardInterrupt):
        with OutputSet(out) as outs:
            for n in NAMES:
                outs.write_text(n, f"new {n}\n")
    assert _state(out) == old


def test_folder_in_the_way_refused_before_any_file_changes(tmp_path):
    out = tmp_path / "out"
    old = _previous_run(out)
    (out / "report.html").unlink()
    (out / "report.html").mkdir()        # a folder named like an output
    del old["report.html"]
    with pytest.raises(InputError, match="folder is in the way"):
        with OutputSet(out) as outs:
            for n in NAMES:
                outs.write_text(n, f"new {n}\n")
    assert _state(out) == old


def test_new_folders_removed_when_the_run_fails(tmp_path):
    out = tmp_path / "new" / "out"
    with pytest.raises(RuntimeError):
        with OutputSet(out) as outs:
            outs.write_text("sub-01/beh/x.tsv", "x\n")
            raise RuntimeError("the work failed")
    assert not (tmp_path / "new").exists()


@pytest.mark.parametrize("how", ["same path", "symlink", "hard link"])
def test_output_that_is_an_input_is_refused(tmp_path, how):
    log = tmp_path / "recorder-log.tsv"
    log.write_text("onset\n12.5\n")
    out = tmp_path / "out"
    out.mkdir()
    target = out / "sub-01_task-music_events.tsv"
    if how == "same path":
        log = target
        log.write_text("onset\n12.5\n")
    elif how == "symlink":
        target.symlink_to(log)
    else:
        os.link(log, target)
    with pytest.raises(InputError, match="input"):
        with protect_inputs([log]), OutputSet(out) as outs:
            outs.write_text(target.name, "onset\tduration\n")
    assert log.read_text() == "onset\n12.5\n"
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


def test_sweep_removes_only_dead_runs_temporaries(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    pid = int(dead.stdout)               # a process that has ended
    host = tables._host()
    stale = tmp_path / f".stimkit-stage.{host}.{pid}.abc123"
    live = tmp_path / f".stimkit-stage.{host}.{os.getpid()}.def456"
    other = tmp_path / f".stimkit-stage.otherhost.{pid}.ghi789"
    for d in (stale, live, other):
        d.mkdir()
        (d / "0000.new").write_text("x")
    old_part = tmp_path / ".x_events.tsv.ab12cd34.part"   # an earlier version's temporary
    old_part.write_text("x")
    mine = tmp_path / "notes.part"                        # not ours: left alone
    mine.write_text("x")
    removed = sweep_stale(tmp_path)
    assert set(removed) == {stale, old_part}
    assert live.exists() and other.exists() and mine.exists()


def test_disk_full_while_staging_is_one_line_exit_1(tmp_path, monkeypatch):
    out = tmp_path / "out"
    old = _previous_run(out)
    real_open = open

    def full(path, mode="r", *a, **k):
        if "w" in mode and str(path).endswith(".new"):
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        return real_open(path, mode, *a, **k)

    monkeypatch.setattr("builtins.open", full)
    with pytest.raises(WorkFailed) as info:
        with OutputSet(out) as outs:
            outs.write_text("a_events.tsv", "new\n")
    msg = str(info.value)
    assert "no space left" in msg and "\n" not in msg and info.value.exit_code == 1
    monkeypatch.undo()
    assert _state(out) == old


def test_name_too_long_is_input_error(tmp_path):
    with pytest.raises(InputError, match="too long") as info:
        with OutputSet(tmp_path / "out") as outs:
            outs.write_text("sub-" + "x" * 300 + "_events.tsv", "x\n")
    assert "\n" not in str(info.value)
    assert not (tmp_path / "out").exists()
