"""Running a study: the demo study (``stimkit study --demo``) on a real Dask LocalCluster and on
local processes gives byte-identical outputs; reruns skip current sessions, a changed input
recomputes only its session, a failing session does not sink the others, an interrupted study
resumes; the BIDS raw part passes the official validator and bidsschematools.

External references: ``dask.distributed.LocalCluster`` (2 worker processes), the official BIDS
validator (``bids-validator-deno``, a declared test dependency from PyPI), ``bidsschematools``'
file-name rules (BIDS schema), the exit codes of DESIGN.md (1: work failed). Counts of
recomputed sessions come from the run's result (``StudyResult.computed``). The demo's recorder
clocks are those stated in :mod:`stimkit.demo.study`.
"""

import gzip
import json
import logging
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from stimkit.cli import main
from stimkit.demo import study as demo
from stimkit.study import load_study, run_study
from stimkit.study.runner import SerialExecutor
from stimkit.study.state import STATE_DIR, is_current, session_record_file

TASK = "listening"
NAMES = [f"sub-{p['id']}_ses-{s}_task-{TASK}" for p in demo.PARTICIPANTS for s in demo.SESSIONS]


def _tree(root: Path) -> dict[str, bytes]:
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file() and STATE_DIR not in p.relative_to(root).parts:
            out[p.relative_to(root).as_posix()] = p.read_bytes()
    return out


@pytest.fixture(scope="module")
def cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                      silence_logs=logging.ERROR) as c:
        yield c


@pytest.fixture(scope="module")
def runs(cluster, tmp_path_factory):
    # the documented command, from a fresh folder, on the cluster ...
    fresh = tmp_path_factory.mktemp("fresh")
    proc = subprocess.run([sys.executable, "-m", "stimkit", "study", "--demo", "-o", "demo-study",
                           "--scheduler", cluster.scheduler_address],
                          cwd=fresh, capture_output=True, text=True, timeout=1800)
    a = fresh / "demo-study"
    # ... and in this process on two local processes
    b = tmp_path_factory.mktemp("on-processes") / "demo-study"
    code_b = main(["study", "--demo", "-o", str(b), "--workers", "2"])
    return a, proc, b, code_b


def _study(b: Path):
    return b / "sourcedata" / "demo-study" / "study.toml"


def test_dask_cluster_and_local_processes_give_identical_bytes(runs, cluster):
    a, proc, b, code_b = runs
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert code_b == 0
    said = proc.stdout + proc.stderr
    assert f"6 computed, 0 already current, 0 failed (Dask cluster at {cluster.scheduler_address})" in said
    assert "performances: 1, analysed in this run: 1" in said         # one recording, aligned once
    for name in NAMES:                                                 # progress per session
        assert f"stimkit: {name} done" in said, name
    ta, tb = _tree(a), _tree(b)
    assert set(ta) == set(tb)
    assert [k for k in ta if ta[k] != tb[k]] == []
    assert f"sub-p01/ses-1/beh/{NAMES[0]}_events.tsv" in ta
    assert "derivatives/stimkit/group/study-report.html" in ta
    for name, data in ta.items():   # no absolute path of either run in any output
        assert str(a).encode() not in data and str(b).encode() not in data, name


def test_each_participant_is_on_their_own_clock(runs):
    _, _, b, _ = runs
    pieces = {}
    for p in demo.PARTICIPANTS:
        for s in demo.SESSIONS:
            ev = pd.read_csv(b / f"sub-{p['id']}/ses-{s}/beh/sub-{p['id']}_ses-{s}_task-{TASK}_events.tsv",
                             sep="\t", na_values="n/a", keep_default_na=False)
            pieces[(p["id"], s)] = ev[ev["trial_type"] == "piece"].iloc[0]
    # the same recording time, mapped through each clock of stimkit.demo.study.CLOCKS
    rec = pieces[("p01", "1")]["recording"]
    for key, (off, ppm) in demo.CLOCKS.items():
        assert pieces[key]["recording"] == pytest.approx(rec, abs=1e-6)
        assert pieces[key]["onset"] == pytest.approx(off + (1 + ppm * 1e-6) * rec, abs=2e-3), key


class _StopAtSubmit(SerialExecutor):
    """Runs ``n`` jobs in this process, then stops as Ctrl-C would."""

    def __init__(self, n: int):
        self.n = n

    def submit(self, fn, /, *args, **kwargs):
        if self.n == 0:
            raise KeyboardInterrupt
        self.n -= 1
        return super().submit(fn, *args, **kwargs)


def test_rerun_skips_a_changed_input_recomputes_its_session_and_an_interrupted_study_resumes(runs, cluster):
    from stimkit.study.plan import plan_study

    _, _, b, _ = runs
    r1 = run_study(load_study(_study(b)), workers=2)
    assert r1.computed == [] and r1.skipped == NAMES and r1.performances_computed == 0
    assert r1.where == "nothing to run"
    before = _tree(b)   # (study.json now names this run's command)
    # touching without changing the content: content hashes say nothing changed
    for f in _study(b).parent.rglob("*"):
        os.utime(f)
    r2 = run_study(load_study(_study(b)), workers=2)
    assert r2.computed == [] and _tree(b) == before
    # one participant's physiological file changes its bytes, not its values (compressed anew), and
    # another session's output is damaged: a session whose files are not as recorded is unfinished
    phys = _study(b).parent / "physio" / "sub-p01_ses-1_recording-heart_physio.tsv.gz"
    phys.write_bytes(gzip.compress(gzip.decompress(phys.read_bytes()), compresslevel=1, mtime=0))
    victim = b / f"sub-p03/ses-2/beh/{NAMES[-1]}_events.tsv"
    victim.write_text("broken")
    # a run stopped (Ctrl-C) after the changed session, before the unfinished one
    with pytest.raises(KeyboardInterrupt):
        run_study(load_study(_study(b)), executor=_StopAtSubmit(1))
    keys = {j.name: j.key for j in plan_study(load_study(_study(b))).sessions}
    assert [n for n in NAMES if is_current(b, n, keys[n])] == NAMES[:-1]
    # it resumes with the unfinished session only, on the cluster named in the study file
    text = _study(b).read_text()
    _study(b).write_text(f'scheduler = "{cluster.scheduler_address}"\n' + text)
    try:
        r3 = run_study(load_study(_study(b)))
    finally:
        _study(b).write_text(text)
    assert r3.where == f"Dask cluster at {cluster.scheduler_address}"
    assert r3.computed == [NAMES[-1]] and r3.performances_computed == 0
    after = _tree(b)
    changed = sorted(k for k in before if before[k] != after.get(k))
    # same clock, same values: the events are the same bytes; what differs records the input's hash
    assert f"sub-p01/ses-1/beh/{NAMES[0]}_events.tsv" not in changed
    assert f"sub-p01/ses-1/beh/{NAMES[0]}_recording-heart_physio.tsv.gz" in changed
    assert all("sub-p01/ses-1/" in k or k == "derivatives/stimkit/study.json" or k.startswith("sourcedata/")
               for k in changed), changed
    assert victim.read_bytes() == before[f"sub-p03/ses-2/beh/{NAMES[-1]}_events.tsv"]


def test_one_failing_session_does_not_sink_the_others(runs, tmp_path, capsys):
    _, _, b, _ = runs
    out = tmp_path / "with-bad"
    shutil.copytree(b, out)  # the six sessions are current there; only the new one runs
    bad = ('\n[[participant]]\nid = "p04"\n[[session]]\nparticipant = "p04"\nsession = "1"\n'
           'performance = "evening"\n[session.sync]\nfrequency_hz = 1000\nduration_s = 0.05\n'
           'recorder_times_s = [10.0, 11.0, 500.0]\n')
    study = _study(out)
    study.write_text(study.read_text() + bad)
    code = main(["study", str(study), "--workers", "1"])  # in this process: no worker to start
    captured = capsys.readouterr()
    bad_name = f"sub-p04_ses-1_task-{TASK}"
    assert code == 1                                   # DESIGN.md: 1 = the work failed
    assert f"1 of 7 session(s) failed: {bad_name}" in captured.err
    assert f"FAILED {bad_name}:" in captured.out and "sync" in captured.out  # the reason
    assert "0 computed, 6 already current, 1 failed" in captured.out
    for name in NAMES:
        sub, ses = name.split("_")[:2]
        assert (out / sub / ses / "beh" / f"{name}_events.tsv").is_file()
    assert not (out / "sub-p04").exists()
    prov = json.loads((out / "derivatives/stimkit/study.json").read_text())
    assert [f["name"] for f in prov["sessions_failed"]] == [bad_name]
    # the failure is not remembered as done: the next run tries it again, and only it
    assert main(["study", str(study), "--workers", "1"]) == 1
    assert "0 computed, 6 already current, 1 failed" in capsys.readouterr().out


def test_bids_raw_part_passes_the_official_validator(runs):
    _, _, b, _ = runs
    exe = shutil.which("bids-validator-deno") or str(Path(sys.executable).with_name("bids-validator-deno"))
    if not Path(exe).exists():
        pytest.skip("bids-validator-deno is not installed (pip install bids-validator-deno; it is in the test extra)")
    res = subprocess.run([exe, str(b), "--format", "json"], capture_output=True, text=True, timeout=600)
    report = json.loads(res.stdout)
    errors = [(i["code"], i.get("location")) for i in report["issues"]["issues"] if i["severity"] == "error"]
    assert errors == []                                # the official BIDS validator: no error
    assert sorted(report["summary"]["subjects"]) == ["p01", "p02", "p03"]
    assert sorted(report["summary"]["sessions"]) == ["1", "2"]


def test_bids_raw_part_read_back_with_bidsschematools(runs):
    from bidsschematools.validator import validate_bids

    _, _, b, _ = runs
    r = validate_bids(str(b))
    assert r["path_tracking"] == []                    # every raw file matches a BIDS schema rule
    matched = {Path(p).name for p in (m["path"] for m in r["match_listing"])}
    assert f"{NAMES[0]}_events.tsv" in matched
    assert f"{NAMES[0]}_recording-heart_physio.tsv.gz" in matched
    assert "participants.tsv" in matched and "participants.json" in matched
    part = pd.read_csv(b / "participants.tsv", sep="\t")
    assert list(part["participant_id"]) == ["sub-p01", "sub-p02", "sub-p03"]
    assert list(part["age"]) == [p["age"] for p in demo.PARTICIPANTS]
    desc = json.loads((b / "derivatives/stimkit/dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"][0]["Name"] == "stimkit"


def test_study_report_has_one_panel_per_participant_and_the_group_figures(runs):
    import base64
    import io
    import re

    from PIL import Image

    _, _, b, _ = runs
    page = (b / "derivatives/stimkit/group/study-report.html").read_text(encoding="utf-8")
    participants = page[page.index("<h2>Participants</h2>"):]
    panels = re.findall(r'<h3>sub-(p\d\d)</h3><figure><img alt="[^"]*" src="data:image/png;base64,([^"]+)"',
                        participants)
    assert [p for p, _ in panels] == [p["id"] for p in demo.PARTICIPANTS]
    group = page[page.index("<h2>Group results</h2>"):page.index("<h2>Participants</h2>")]
    captions = re.findall(r"<figcaption>([^<]*)</figcaption>", group)
    assert [c.split()[0] for c in captions] == ["Prevalence", "Direction", "Mixed"]
    for data in [d for _, d in panels] + re.findall(r'src="data:image/png;base64,([^"]+)"', group):
        png = base64.b64decode(data)
        assert png[:8] == b"\x89PNG\r\n\x1a\n"          # the PNG signature (ISO/IEC 15948)
        assert min(Image.open(io.BytesIO(png)).size) > 100
    # the group tables the page shows are on disk too, one row per participant x family
    resp = pd.read_csv(b / "derivatives/stimkit/group/responders.tsv", sep="\t")
    prev = pd.read_csv(b / "derivatives/stimkit/group/prevalence.tsv", sep="\t")
    assert set(resp["participant"]) == {"p01", "p02", "p03"}
    k = resp.groupby(["series", "N", "trial_type"])["responder"].sum()
    assert (prev.set_index(["series", "N", "trial_type"])["k"] == k.reindex(
        prev.set_index(["series", "N", "trial_type"]).index)).all()


def test_study_never_writes_over_an_input_kept_in_the_dataset(tmp_path, capsys):
    # the project's rule (inputs are never overwritten): a participant's recorder log saved in the
    # dataset under the session's BIDS events name was replaced by the events table, exit 0;
    # now the study refuses before any work (exit 2, one line naming the file) and writes no session
    import numpy as np
    import soundfile as sf

    SCORE = Path(__file__).resolve().parents[2] / "example_scores" / "kites-at-dusk.musicxml"

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
