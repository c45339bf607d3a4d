"""Windows around events and per-piece summaries, on signals whose answers are known."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stimkit.stats.windows import event_windows, loudness_range, piece_summary


def test_known_step_difference():
    rate = 10.0
    t = (np.arange(600) + 0.5) / rate
    f = pd.DataFrame({"x": np.where(t < 30.0, 2.0, 5.0), "y": t}, index=t)
    ev = pd.DataFrame({"onset": [30.0, 10.0], "recording": [30.0, 10.0], "trial_type": ["key", "dynamic"],
                       "label": ["E minor", "p"], "piece": ["A", "A"]})
    w = event_windows(f, ev)
    x = w[w["feature"] == "x"].set_index("event")
    assert x.loc[0, "difference"] == pytest.approx(3.0)     # the step
    assert x.loc[1, "difference"] == pytest.approx(0.0)     # no step at 10 s
    assert x.loc[0, "pre_n"] == 50 and x.loc[0, "post_n"] == 50  # 5 s x 10 Hz each side
    y = w[w["feature"] == "y"].set_index("event")
    # a ramp of slope 1 s/s: window means differ by (pre + post)/2 = 5 s
    assert y.loc[0, "difference"] == pytest.approx(5.0)
    assert list(w["event"]) == [0, 0, 1, 1]


def test_non_finite_values_skipped_and_missing_times():
    t = np.arange(100) / 10.0
    v = np.full(100, -20.0)
    v[:30] = -np.inf  # digital silence in LUFS
    f = pd.DataFrame({"short_term_lufs": v}, index=t)
    ev = pd.DataFrame({"recording": [5.0, np.nan], "trial_type": ["key", "sync"]})
    w = event_windows(f, ev)
    assert len(w) == 1                                   # the event without a time is skipped
    assert w["pre_mean"].iloc[0] == pytest.approx(-20.0)  # mean over finite frames only
    assert w["pre_n"].iloc[0] == 20


def _short_term_series(levels_dbfs, seconds_each, *, rate=8000, hop_s=0.1):
    """Short-term loudness (3 s window, EBU Tech 3341) at 10 Hz of back-to-back 1 kHz tones,
    measured with pyloudnorm (ungated in effect on steady 3 s windows)."""
    import pyloudnorm as pyln  # a declared test dependency: a missing one fails, never skips
    seg = [10 ** (db / 20.0) * np.sin(2 * np.pi * 1000.0 * np.arange(int(seconds_each * rate)) / rate)
           for db in levels_dbfs]
    y = np.concatenate(seg)
    y = np.column_stack([y, y])
    meter = pyln.Meter(rate, filter_class="DeMan")
    win, hop = int(3.0 * rate), int(hop_s * rate)
    return np.array([meter.integrated_loudness(y[s:s + win]) for s in range(0, len(y) - win + 1, hop)])


@pytest.mark.parametrize("levels,expected", [((-20, -30), 10.0), ((-40, -20), 20.0)])
def test_loudness_range_ebu_3342(levels, expected):
    # EBU Tech 3342 test signals (20 s each, back to back): LRA 10 +-1 and 20 +-1 LU
    st = _short_term_series(levels, 20.0)
    assert loudness_range(st) == pytest.approx(expected, abs=1.0)


def test_piece_summary_numbers():
    t = (np.arange(1200) + 0.5) / 10.0
    tempo = np.where(t < 60, 100.0, 120.0)
    f = pd.DataFrame({"momentary_lufs": np.where(t < 60, -30.0, -20.0), "tempo_bpm": tempo,
                      "onset_rate_hz": np.full(t.size, 4.0)}, index=t)
    pieces = pd.DataFrame({"piece": ["A", "B"], "start": [0.0, 60.0], "end": [60.0, 120.0]})
    s = piece_summary(f, pieces).set_index("piece")
    assert s.loc["A", "duration_s"] == 60.0
    assert s.loc["A", "loudness_mean"] == pytest.approx(-30.0)
    assert s.loc["B", "tempo_mean_bpm"] == pytest.approx(120.0)
    assert s.loc["B", "tempo_sd_bpm"] == pytest.approx(0.0)
    assert s.loc["A", "onset_rate_mean_hz"] == pytest.approx(4.0)
    assert s.loc["A", "loudness_column"] == "momentary_lufs"  # fallback column
    assert np.isnan(s.loc["A", "lra_lu"])  # no short-term loudness, no LRA given
    s2 = piece_summary(f.drop(columns="tempo_bpm"), pieces, lra_lu={"A": 7.5}).set_index("piece")
    assert s2.loc["A", "lra_lu"] == 7.5 and np.isnan(s2.loc["A", "tempo_mean_bpm"])


def test_window_summary_by_kind():
    t = (np.arange(1200) + 0.5) / 10.0
    x = np.floor(t / 30.0)  # a unit step every 30 s
    f = pd.DataFrame({"x": x}, index=t)
    ev = pd.DataFrame({"recording": [30.0, 60.0, 90.0, 45.0], "trial_type": ["section", "section", "section", "key"]})
    from stimkit.stats.windows import window_summary

    s = window_summary(event_windows(f, ev)).set_index("trial_type")
    assert s.loc["section", "n_events"] == 3
    assert s.loc["section", "mean_difference"] == pytest.approx(1.0)   # each step is 1
    assert s.loc["section", "sd_difference"] == pytest.approx(0.0)
    assert s.loc["key", "mean_difference"] == pytest.approx(0.0) and np.isnan(s.loc["key", "sd_difference"])


def test_windows_cut_at_piece_edges():
    t = (np.arange(600) + 0.5) / 10.0
    f = pd.DataFrame({"x": np.where((t >= 20.0) & (t < 50.0), 1.0, 9.0)}, index=t)  # 9 = applause
    ev = pd.DataFrame({"recording": [20.0, 22.0, 48.0], "trial_type": ["piece", "dynamic", "dynamic"]})
    spans = pd.DataFrame({"start": [20.0], "end": [50.0]})
    w = event_windows(f, ev, spans=spans).set_index("event")
    assert np.isnan(w.loc[0, "pre_mean"]) and w.loc[0, "pre_n"] == 0  # nothing before the piece
    assert w.loc[1, "pre_mean"] == pytest.approx(1.0) and w.loc[1, "pre_n"] == 20  # 2 s x 10 Hz
    assert w.loc[2, "post_mean"] == pytest.approx(1.0) and w.loc[2, "post_n"] == 20
    full = event_windows(f, ev).set_index("event")
    assert full.loc[1, "pre_mean"] == pytest.approx((30 * 9.0 + 20 * 1.0) / 50)  # uncut: applause in
