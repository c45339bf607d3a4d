"""Readers of physiological files: BIDS physio timing, three input forms of one simulated ECG,
artefact rules, and bad input (one line naming the file)."""

import gzip
import json

import numpy as np
import pandas as pd
import pytest

from stimkit.errors import InputError
from stimkit.physio.artefacts import artefact_share, flag_artefacts, gap_free_segments
from stimkit.physio.read import read_beat_table, read_bids_physio, read_physio
from stimkit.physio.series import BeatSeries


def write_bids(tmp_path, name, columns, data, *, fs, start, units=None, drop=None):
    tsv = tmp_path / f"{name}_physio.tsv.gz"
    lines = "\n".join("\t".join("n/a" if not np.isfinite(v) else f"{v:.6g}" for v in row) for row in data)
    tsv.write_bytes(gzip.compress((lines + "\n").encode()))
    side = {"SamplingFrequency": fs, "StartTime": start, "Columns": columns}
    for c, u in (units or {}).items():
        side[c] = {"Units": u}
    for k in drop or ():
        side.pop(k)
    (tmp_path / f"{name}_physio.json").write_text(json.dumps(side))
    return tsv


@pytest.fixture(scope="module")
def ecg_beats():
    # PHYSIO-STATS 7.9: neurokit2.ecg_simulate(duration=300, sampling_rate=250, heart_rate=70,
    # heart_rate_std=3, random_state=42) + ecg_peaks -> 350 beats, mean RR 855.9 ms
    import neurokit2 as nk

    ecg = nk.ecg_simulate(duration=300, sampling_rate=250, heart_rate=70, heart_rate_std=3, random_state=42)
    _, info = nk.ecg_peaks(ecg, sampling_rate=250)
    return ecg, np.asarray(info["ECG_R_Peaks"])


def test_simulated_ecg_reference_values(ecg_beats):
    _, peaks = ecg_beats
    assert peaks.size == 350
    assert np.mean(np.diff(peaks)) / 250 * 1000 == pytest.approx(855.9, rel=0.02)  # vs 857.1 nominal


def test_bids_timing_start_time(tmp_path):
    # BIDS physio: sample k at StartTime + k / SamplingFrequency; fs 1000, StartTime -2.5 ->
    # sample 2500 at t = 0 (PHYSIO-STATS 7.8)
    n = 6000
    col = np.zeros(n)
    beats = [2500, 3300, 4100, 4900]
    col[beats] = [800, 800, 800, 800]
    f = write_bids(tmp_path, "sub-01", ["rr"], col[:, None], fs=1000, start=-2.5, units={"rr": "ms"})
    s = read_bids_physio(f)
    np.testing.assert_allclose(s.t, [0.0, 0.8, 1.6, 2.4])
    np.testing.assert_allclose(s.x, 800)
    assert "StartTime" in s.clock


def test_three_readers_agree_on_simulated_ecg(tmp_path, ecg_beats):
    # one neurokit2-simulated ECG written three ways: BIDS value_at_beat, BIDS marker, and a
    # two-column TSV; the readers must give the same beats (times to a sample, values to 1e-6)
    _, peaks = ecg_beats
    fs = 250
    t = peaks / fs
    rr = 1000 * np.diff(t)
    n = peaks[-1] + 10
    val = np.zeros(n)
    val[peaks[1:]] = rr / 1000.0  # in seconds: the sidecar says so
    mark = np.zeros(n)
    mark[peaks] = 1
    a = read_bids_physio(write_bids(tmp_path, "a", ["rr"], val[:, None], fs=fs, start=0.0, units={"rr": "s"}))
    b = read_bids_physio(write_bids(tmp_path, "b", ["trigger"], mark[:, None], fs=fs, start=0.0),
                         column="trigger", mode="marker")
    tab = tmp_path / "c.tsv"
    tab.write_text("".join(f"{ti:.6f}\t{xi:.6f}\n" for ti, xi in zip(t[1:], rr)))
    c = read_physio(tab)
    for s in (b, c):
        np.testing.assert_allclose(s.t, a.t, atol=1e-6)
        np.testing.assert_allclose(s.x, a.x, atol=1e-3)
    assert a.n == 349


def test_waveform_reader_finds_the_same_beats(tmp_path, ecg_beats):
    ecg, peaks = ecg_beats
    s = read_bids_physio(write_bids(tmp_path, "w", ["ecg"], ecg[:, None], fs=250, start=0.0), kind="ecg")
    assert s.n == pytest.approx(peaks.size - 1, abs=2)
    assert np.mean(s.x) == pytest.approx(855.9, rel=0.02)
    assert s.suspect is not None


def test_artefact_rules_isolated_spike():
    # PHYSIO-STATS 7.9: on 800, 800, 1200, 800, 800 the 20 % rule flags only the 1200
    # (as hrv-analysis' malik rule does); on 800, 800, 560, 1040, 800, 800 R2 flags 560 and 1040
    x = np.array([800, 800, 1200, 800, 800.0])
    s = BeatSeries(t=np.cumsum(x) / 1000, x=x, valid=np.ones(5, bool), kind="rr")
    r = flag_artefacts(s)
    assert list(r) == ["", "", "R2", "", ""]
    y = np.array([800, 800, 560, 1040, 800, 800.0])
    r = flag_artefacts(BeatSeries(t=np.cumsum(y) / 1000, x=y, valid=np.ones(6, bool), kind="rr"))
    assert list(r) == ["", "", "R2", "R2", "", ""]


def test_artefact_order_and_segments():
    rng = np.random.default_rng(0)
    x = 800 + rng.normal(0, 10, 200)
    x[10] = 250          # R1 (below 300 ms)
    x[50:57] = 1500      # a long run: splits the series
    x[100] = 900         # 12.5 % above its neighbours: passes R2, caught by Hampel (R3)
    valid = np.ones(200, bool)
    valid[150] = False   # R0
    s = BeatSeries(t=np.cumsum(x) / 1000, x=x, valid=valid, kind="rr")
    r = flag_artefacts(s)
    assert r[10] == "R1" and r[150] == "R0" and r[100] == "R3"
    assert np.all(r[50:57] != "")  # R2 rejects the jump; after five agreeing rejections the
    # level is accepted as lasting and then R3 (Hampel) flags the run against its neighbours
    share, verdict = artefact_share(r)
    assert share == pytest.approx(10 / 200) and verdict == "ok"  # exactly 5 %: "> 5 %" warns
    assert artefact_share(np.array(["R1"] * 6 + [""] * 94))[1] == "warn"
    assert artefact_share(np.array(["R1"] * 21 + [""] * 79))[1] == "unreliable"
    segs = gap_free_segments(s, r, max_run=3, min_length=20)
    assert len(segs) == 2  # split at the 7-beat run; the single flags interpolated
    assert all(np.all(np.abs(seg.x - 800) < 60) for seg in segs)


@pytest.mark.parametrize("problem, message", [
    ("decreasing", "not strictly increasing"),
    ("bpm", "does not look like intervals"),
    ("few", "too few"),
])
def test_bad_plain_tables(tmp_path, problem, message):
    f = tmp_path / "beats.tsv"
    if problem == "decreasing":
        f.write_text("time\trr\n1.0\t800\n1.8\t800\n1.7\t800\n2.5\t800\n")
    elif problem == "bpm":
        f.write_text("time\trr\n" + "".join(f"{i * 0.8:.2f}\t75\n" for i in range(1, 50)))
    else:
        f.write_text("time\trr\n1.0\t800\n1.8\t800\n")
    with pytest.raises(InputError) as e:
        read_physio(f)
    assert message in str(e.value) and "beats.tsv" in str(e.value) and "\n" not in str(e.value)


def test_bad_bids_inputs(tmp_path):
    col = np.zeros((3000, 1))
    col[[100, 900, 1700, 2500], 0] = 800
    with pytest.raises(InputError, match="StartTime"):
        read_bids_physio(write_bids(tmp_path, "m", ["rr"], col, fs=1000, start=0.0, drop=["StartTime"]))
    with pytest.raises(InputError, match="Units 'bpm'"):
        read_bids_physio(write_bids(tmp_path, "u", ["rr"], col, fs=1000, start=0.0, units={"rr": "bpm"}))
    f = write_bids(tmp_path, "n", ["rr"], col, fs=1000, start=0.0, units={"rr": "ms"})
    (tmp_path / "n_physio.json").unlink()
    with pytest.raises(InputError, match="sidecar"):
        read_bids_physio(f)
    g = write_bids(tmp_path, "k", ["rr", "extra"], col, fs=1000, start=0.0)
    with pytest.raises(InputError, match="columns"):
        read_bids_physio(g)


def test_plain_table_conventions(tmp_path):
    f = tmp_path / "b.tsv"
    rows = [(i * 0.8, 0.8, 1 if i != 5 else 0, "normal" if i != 8 else "ventricular") for i in range(1, 40)]
    pd.DataFrame(rows, columns=["beat_time", "ibi", "valid", "beat_type"]).to_csv(f, sep="\t", index=False)
    s = read_beat_table(f)
    assert s.x[0] == pytest.approx(800)  # seconds -> ms, with a warning
    assert any("seconds" in w for w in s.warnings)
    assert not s.valid[4] and not s.valid[7] and s.valid.sum() == 37
