"""The demo study's inputs: a valid study file, one shared performance, each participant's recorder
clock and simulated physiology as stated in stimkit.demo.study.

The clocks are checked against the renderer's ground truth of the sync marks
(example_audio/demo-truth.json); the physiology is read back with stimkit.physio.read_physio and
the planted responses measured directly from the written intervals (no stimkit statistics).
The whole demo run (``stimkit study --demo``, on a LocalCluster and on local processes) is in
test_runner.py.
"""

import json
from pathlib import Path

import numpy as np
import pytest

from stimkit.demo import study as demo
from stimkit.study.plan import plan_study
from stimkit.study.studyfile import load_study

TRUTH = Path(__file__).resolve().parents[2] / "example_audio" / "demo-truth.json"


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    return demo.write_demo_study(tmp_path_factory.mktemp("demo") / "sourcedata" / "demo-study")


def test_study_file_is_valid_and_shares_one_performance(written):
    st = load_study(written)
    assert [s.name for s in st.sessions] == [f"sub-{p}_ses-{s}" for p in ("p01", "p02", "p03") for s in ("1", "2")]
    plan = plan_study(st)
    assert len(plan.performances) == 1                       # one recording, aligned once
    assert st.out_dir == written.parent.parent.parent.resolve()  # the dataset around sourcedata/


def test_each_session_has_its_own_recorder_clock(written):
    marks = [m["recording_s"] for m in json.loads(TRUTH.read_text())["sync_marks"]]
    st = load_study(written)
    for s in st.sessions:
        off, ppm = demo.CLOCKS[(s.participant, s.session)]
        logged = np.loadtxt(s.sync.recorder_file, skiprows=1, usecols=1)
        want = off + (1 + ppm * 1e-6) * np.asarray(marks)
        np.testing.assert_allclose(logged, want, atol=1e-4)  # the 0.1 ms resolution of a trigger channel


def test_physiology_carries_the_stated_responses(written):
    from stimkit.physio import read_physio

    st = load_study(written)
    for s in st.sessions:
        (p,) = s.physio
        series = read_physio(p.file, kind="rr")
        off, ppm = demo.CLOCKS[(s.participant, s.session)]
        rec = (series.t - off) / (1 + ppm * 1e-6)
        inside = np.zeros(rec.size, bool)
        for b in demo.PLANTED_RECORDING_S:
            inside |= (rec >= b + 2.0) & (rec < b + demo.RESPONSE_S)
        shift = series.x[inside].mean() - series.x[~inside].mean()
        # the planted shift of +-60 ms (p01 slower, p02 faster), none for p03; AR(1) noise of
        # SD 25 ms averaged over about 80 beats leaves a few ms of error
        assert shift == pytest.approx(demo.RESPONSES[s.participant] * demo.RESPONSE_MS, abs=15.0)
