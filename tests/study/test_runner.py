"""Running a study: a real Dask LocalCluster and local processes give byte-identical outputs;
reruns skip current sessions, a changed input recomputes only its session, a failing session
does not sink the others, an interrupted study resumes; the BIDS raw part passes the official
validator and bidsschematools.

External references: ``dask.distributed.LocalCluster`` (2 worker processes), the official BIDS
validator (``bids-validator-deno``, a declared test dependency from PyPI), ``bidsschematools``'
file-name rules (BIDS schema), the exit codes of DESIGN.md (1: work failed). Counts of
recomputed sessions come from the run's result (``StudyResult.computed``).
"""

import json
import logging
import os
import shutil
import subprocess
from pathlib import Path

import pandas as pd
import pytest

from stimkit.cli import main
from stimkit.study import load_study, run_study
from stimkit.study.state import STATE_DIR, session_record_file

from studyfix import CLOCKS, write_tiny_study


def _tree(root: Path) -> dict[str, bytes]:
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file() and STATE_DIR not in p.relative_to(root).parts:
            out[p.relative_to(root).as_posix()] = p.read_bytes()
    return out


@pytest.fixture(scope="module")
def runs(tiny_study, tmp_path_factory):
    from distributed import LocalCluster

    a = tmp_path_factory.mktemp("on-dask") / "out"
    b = tmp_path_factory.mktemp("on-processes") / "out"
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                      silence_logs=logging.ERROR) as cluster:
        ra = run_study(load_study(tiny_study, out_dir=a), scheduler=cluster.scheduler_address)
    rb = run_study(load_study(tiny_study, out_dir=b), workers=2)
    return a, ra, b, rb


def test_dask_cluster_and_local_processes_give_identical_bytes(runs):
    a, ra, b, rb = runs
    assert ra.where.startswith("Dask cluster at tcp://") and rb.where == "2 local processes"
    assert ra.computed == rb.computed == ["sub-a1_ses-1_task-listening", "sub-b2_ses-1_task-listening"]
    assert ra.performances_computed == rb.performances_computed == 1      # one recording, aligned once
    ta, tb = _tree(a), _tree(b)
    assert set(ta) == set(tb)
    assert [k for k in ta if ta[k] != tb[k]] == []
    assert "sub-a1/ses-1/beh/sub-a1_ses-1_task-listening_events.tsv" in ta
    assert "derivatives/stimkit/group/study-report.html" in ta
    for name, data in ta.items():   # no absolute path of either run in any output
        assert str(a).encode() not in data and str(b).encode() not in data, name


def test_each_participant_is_on_their_own_clock(runs, tiny_study):
    _, _, b, _ = runs
    pieces = {}
    for pid in CLOCKS:
        ev = pd.read_csv(b / f"sub-{pid}/ses-1/beh/sub-{pid}_ses-1_task-listening_events.tsv", sep="\t",
                         na_values="n/a", keep_default_na=False)
        pieces[pid] = ev[ev["trial_type"] == "piece"].iloc[0]
    # the same recording time, mapped through each participant's clock (offset + slope x recording)
    rec = pieces["a1"]["recording"]
    assert pieces["b2"]["recording"] == pytest.approx(rec, abs=1e-6)
    for pid, (off, ppm) in CLOCKS.items():
        assert pieces[pid]["onset"] == pytest.approx(off + (1 + ppm * 1e-6) * rec, abs=2e-3)


def test_rerun_skips_and_a_changed_input_recomputes_only_its_session(runs, tiny_study):
    _, _, b, rb = runs
    before = _tree(b)
    r1 = run_study(load_study(tiny_study, out_dir=b), workers=2)
    assert r1.computed == [] and len(r1.skipped) == 2 and r1.performances_computed == 0
    # touching without changing the content: content hashes say nothing changed
    for f in tiny_study.parent.glob("*"):
        os.utime(f)
    r2 = run_study(load_study(tiny_study, out_dir=b), workers=2)
    assert r2.computed == []
    # one participant's recorder file changes (a blank cell more, same times): only that session
    sync = tiny_study.parent / "sync-a1.tsv"
    sync.write_text(sync.read_text() + "n/a\n")
    r3 = run_study(load_study(tiny_study, out_dir=b), workers=1)
    assert r3.computed == ["sub-a1_ses-1_task-listening"] and r3.performances_computed == 0
    after = _tree(b)
    changed = sorted(k for k in before if before[k] != after.get(k))
    # same clock, same events: only the provenance (the recorder file's hash) and the study
    # record (the session's key) differ
    assert changed == ["derivatives/stimkit/study.json",
                       "derivatives/stimkit/sub-a1/ses-1/beh/provenance.json"] or all(
        "sub-a1" in k or k.endswith("study.json") for k in changed)


def test_an_interrupted_study_resumes_with_the_unfinished_session(runs, tiny_study):
    _, _, b, _ = runs
    # a session stopped before its record was written is unfinished: only it runs again
    session_record_file(b, "sub-b2_ses-1_task-listening").unlink()
    r = run_study(load_study(tiny_study, out_dir=b), workers=1)
    assert r.computed == ["sub-b2_ses-1_task-listening"]
    # a damaged output counts as unfinished too
    victim = b / "sub-a1/ses-1/beh/sub-a1_ses-1_task-listening_events.tsv"
    victim.write_text("broken")
    r = run_study(load_study(tiny_study, out_dir=b), workers=1)
    assert r.computed == ["sub-a1_ses-1_task-listening"]
    assert victim.read_text().startswith("onset\tduration")


def test_one_failing_session_does_not_sink_the_others(runs, tiny_study, tmp_path, capsys):
    _, _, b, _ = runs
    folder = tmp_path / "with-bad"
    shutil.copytree(tiny_study.parent, folder)
    bad = ('[[participant]]\nid = "c3"\n[[session]]\nparticipant = "c3"\nsession = "1"\nperformance = "kites"\n'
           '[session.sync]\nfrequency_hz = 1000\nduration_s = 0.05\nrecorder_times_s = [10.0, 11.0, 500.0]\n')
    study = write_tiny_study(folder, extra_sessions=bad)
    out = tmp_path / "out"
    shutil.copytree(b, out)  # the two good sessions are current there; only the new one runs
    code = main(["study", str(study), "-o", str(out), "--workers", "2"])
    captured = capsys.readouterr()
    assert code == 1                                   # DESIGN.md: 1 = the work failed
    assert "1 of 3 session(s) failed: sub-c3_ses-1_task-listening" in captured.err
    assert "FAILED sub-c3_ses-1_task-listening:" in captured.out and "sync" in captured.out  # the reason
    assert "0 computed, 2 already current, 1 failed" in captured.out
    for pid in ("a1", "b2"):
        assert (out / f"sub-{pid}/ses-1/beh/sub-{pid}_ses-1_task-listening_events.tsv").is_file()
    assert not (out / "sub-c3").exists()
    prov = json.loads((out / "derivatives/stimkit/study.json").read_text())
    assert [f["name"] for f in prov["sessions_failed"]] == ["sub-c3_ses-1_task-listening"]
    # the failure is not remembered as done: the next run tries it again, and only it
    assert main(["study", str(study), "-o", str(out), "--workers", "1"]) == 1
    assert "0 computed, 2 already current, 1 failed" in capsys.readouterr().out


def test_bids_raw_part_passes_the_official_validator(runs):
    _, _, b, _ = runs
    exe = shutil.which("bids-validator-deno") or str(Path(os.sys.executable).with_name("bids-validator-deno"))
    if not Path(exe).exists():
        pytest.skip("bids-validator-deno is not installed (pip install bids-validator-deno; it is in the test extra)")
    res = subprocess.run([exe, str(b), "--format", "json"], capture_output=True, text=True, timeout=600)
    report = json.loads(res.stdout)
    errors = [(i["code"], i.get("location")) for i in report["issues"]["issues"] if i["severity"] == "error"]
    assert errors == []                                # the official BIDS validator: no error
    assert sorted(report["summary"]["subjects"]) == ["a1", "b2"]


def test_bids_raw_part_read_back_with_bidsschematools(runs):
    from bidsschematools.validator import validate_bids

    _, _, b, _ = runs
    r = validate_bids(str(b))
    assert r["path_tracking"] == []                    # every raw file matches a BIDS schema rule
    matched = {Path(p).name for p in (m["path"] for m in r["match_listing"])}
    assert "sub-a1_ses-1_task-listening_events.tsv" in matched
    assert "participants.tsv" in matched
    part = pd.read_csv(b / "participants.tsv", sep="\t")
    assert list(part["participant_id"]) == ["sub-a1", "sub-b2"] and list(part["age"]) == [40, 41]
    desc = json.loads((b / "derivatives/stimkit/dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"][0]["Name"] == "stimkit"


def test_study_never_writes_over_an_input_kept_in_the_dataset(tmp_path, capsys):
    # the project's rule (inputs are never overwritten): a participant's recorder log saved in the
    # dataset under the session's BIDS events name was replaced by the events table, exit 0;
    # now the study refuses before any work (exit 2, one line naming the file) and writes no session
    import numpy as np
    import soundfile as sf

    from studyfix import SCORE

    sf.write(tmp_path / "take.wav", np.zeros(22050, dtype=np.float32), 22050)
    beh = tmp_path / "out" / "sub-01" / "ses-1" / "beh"
    beh.mkdir(parents=True)
    log = beh / "sub-01_ses-1_task-listening_events.tsv"
    log.write_text("onset\n12.5\n620.25\n", "utf-8")
    (tmp_path / "study.toml").write_text(
        'name = "t"\noutput = "out"\ntask = "listening"\nseed = 1\n[[performance]]\nid = "c"\n'
        f'recording = "take.wav"\n[[performance.piece]]\nscore = "{SCORE}"\n[[participant]]\nid = "01"\n'
        '[[session]]\nparticipant = "01"\nsession = "1"\nperformance = "c"\n[session.sync]\n'
        f'frequency_hz = 1000\nduration_s = 0.05\nrecorder_file = "{log.relative_to(tmp_path)}"\n')
    assert main(["study", str(tmp_path / "study.toml"), "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and log.name in err and "would replace it" in err
    assert log.read_text("utf-8") == "onset\n12.5\n620.25\n"
    assert not (tmp_path / "out" / "derivatives").exists() and sorted(p.name for p in beh.iterdir()) == [log.name]
