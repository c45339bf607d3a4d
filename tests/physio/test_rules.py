"""Rules of the specification that the other files exercise only in passing: window statuses
(PHYSIO-STATS 2.1), the Kamath & Fallen option of R2, the uniform share null (2.5), the reader
warnings (1.1) and the respiration and skin-conductance readers (neurokit2's simulators)."""

import numpy as np
import pytest

from stimkit.physio.artefacts import flag_artefacts
from stimkit.physio.read import read_beat_table, series_from_signal
from stimkit.physio.series import BeatSeries
from stimkit.physio.span import Span
from stimkit.physio.windows import WindowSetup, _share_null_sets, boundary_table, family_tests

from physio_sim import events_for


def setup_800(n=400, ok=None, span=(5.0, 300.0)):
    t = np.arange(1, n + 1) * 0.8
    x = 800 + np.random.default_rng(0).normal(0, 10, n)
    return WindowSetup(t=t, x=x, ok=np.ones(n, bool) if ok is None else ok, span=Span(np.array([span[0]]),
                       np.array([span[1]])), fixed_rate_hz=None)


def test_window_statuses_and_overlap():
    # PHYSIO-STATS 2.1: a window leaving Omega is "edge"; < 80 % valid beats "insufficient";
    # another boundary of the family inside a window flags "overlap"
    ok = np.ones(400, bool)
    ok[200:206] = False                      # 6 of the 20 beats after 160 s invalid (70 % valid)
    st = setup_800(ok=ok)
    b = [10.0, 100.0, 110.0, 159.9, 290.0]   # 10 s: 20 beats before leave Omega; 290 s: after leaves
    bounds = boundary_table(events_for([(5.0, 300.0)], b), families=("dynamic",))
    tab, summ = family_tests(st, bounds, size=20, rho1=0.0, k_pseudo=200, share_null="circular_shift", r_share=50,
                             min_shift_s=30.0, alpha=0.05, correction="fdr_bh", ci_method="pseudo",
                             rng_pseudo=np.random.default_rng(1), rng_share=np.random.default_rng(2),
                             participant="x", series="rr")
    status = dict(zip(tab.onset, tab.status))
    assert status[10.0] == "edge" and status[290.0] == "edge" and status[159.9] == "insufficient"
    assert status[100.0] == "ok" and status[110.0] == "ok"
    flags = dict(zip(tab["onset"], tab["flags"]))
    assert flags[100.0] == "overlap" and flags[110.0] == "overlap"   # 10 s apart, 16 s windows
    assert summ["B"] == 2


def test_uniform_share_null_keeps_the_minimum_spacing():
    # PHYSIO-STATS 2.5: "uniform" pseudo sets are B sorted uniform times with the observed minimum
    # spacing
    st = setup_800(n=800, span=(0.0, 600.0))
    tb = np.array([100.0, 130.0, 300.0, 500.0])
    sets = _share_null_sets(st, tb, method="uniform", r=200, min_shift_s=30.0, rng=np.random.default_rng(3))
    assert sets.shape == (200, 4)
    assert np.all(np.diff(np.sort(sets, axis=1), axis=1) >= 30.0 - 1e-9)
    circ = _share_null_sets(st, tb, method="circular_shift", r=50, min_shift_s=30.0, rng=np.random.default_rng(3))
    gaps = np.sort(np.diff(np.sort(np.r_[tb, tb[0] + 600.0])))  # circular spacing kept by a rotation
    for row in circ:
        g = np.sort(np.diff(np.sort(np.r_[row, np.min(row) + 600.0])))
        np.testing.assert_allclose(g, gaps, atol=1e-6)


def test_kamath_option_of_the_successive_rule():
    # Kamath & Fallen 1995: +32.5 % / -24.5 % of the last accepted value; the default 20 % rule
    # (Malik et al. 1989) flags +30 % and -22 % too, Kamath's only -26 %
    x = np.array([800, 800, 800, 800, 800, 1040, 800, 800, 624, 800, 800, 592, 800, 800.0])
    s = BeatSeries(t=np.cumsum(x) / 1000, x=x, valid=np.ones(x.size, bool), kind="rr")
    assert list(np.flatnonzero(flag_artefacts(s) == "R2")) == [5, 8, 11]
    assert list(np.flatnonzero(flag_artefacts(s, successive="kamath") == "R2")) == [11]


def test_reader_warnings(tmp_path):
    # PHYSIO-STATS 1.1 (b): for rr, warn when the intervals disagree with the beat-time
    # differences by more than 5 % (median): the interval is stamped at the wrong beat
    t = np.cumsum(np.r_[800, np.tile([700, 900], 40)]) / 1000
    rr = np.r_[800, np.tile([700, 900], 40)]
    f = tmp_path / "b.tsv"
    f.write_text("time\trr\n" + "".join(f"{a:.3f}\t{b:.0f}\n" for a, b in zip(t[1:], rr[:-1])))  # one beat late
    assert any("stamped" in w for w in read_beat_table(f).warnings)
    g = tmp_path / "c.tsv"
    g.write_text("time\trr\n" + "".join(f"{a:.3f}\t{b:.0f}\n" for a, b in zip(t, rr)))
    assert not read_beat_table(g).warnings


def test_respiration_and_skin_conductance_readers():
    # neurokit2's simulators as the outside reference: rsp_simulate at 15 breaths/min gives
    # breath-to-breath intervals near 4000 ms; eda_simulate's tonic level comes out at 4 Hz,
    # windowed in seconds (a fixed-rate series)
    import neurokit2 as nk

    rsp = nk.rsp_simulate(duration=120, sampling_rate=50, respiratory_rate=15, random_state=1)
    s = series_from_signal(rsp, rate_hz=50, start_s=2.0, kind="rsp")
    assert s.kind == "breath" and not s.fixed_rate
    assert np.median(s.x) == pytest.approx(4000, rel=0.1)
    assert s.t[0] > 2.0
    eda = nk.eda_simulate(duration=60, sampling_rate=32, scr_number=3, random_state=2)
    e = series_from_signal(eda, rate_hz=32, start_s=0.0, kind="eda")
    assert e.fixed_rate and e.rate_hz == pytest.approx(4.0) and e.unit == "uS"
    assert e.n == 240 and np.all(np.diff(e.t) == pytest.approx(0.25))
    # a 4 Hz ECG-like quantisation is warned about (beat times coarser than 4 ms)
    ecg = nk.ecg_simulate(duration=30, sampling_rate=200, heart_rate=70, random_state=3)
    assert any("quantised" in w for w in series_from_signal(ecg, rate_hz=200, start_s=0, kind="ecg").warnings)
