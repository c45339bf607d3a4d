"""Checking by ear: the list of places, and the recording with clicks at the placed times.

The click positions are checked on a silent recording (so the file holds only the clicks):
each click's first sample must sit at round(t * rate) (rate 22.05 kHz), and its pitch is read
with numpy's FFT (1000 Hz for bars, 2500 Hz for boundaries, stated in CLICK_SETTINGS).
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
import soundfile as sf

from stimkit.report.check import CLICK_SETTINGS, MAX_CHECK_RATE_HZ, check_places, click_track


def test_places_are_merged_plain_and_placed_in_pieces(session):
    regions = [{"start": 100.0, "end": 104.0, "reason": "2.5 s of recording (104.84-107.30 s, score_qn 12-14) match the score poorly"},
               {"start": 103.0, "end": 106.0, "reason": "low local confidence"},
               {"start": 143.5, "end": 144.0, "reason": ""}]          # just after the first piece
    reps = [{"start": 40.0, "end": 70.0, "taken": True, "label": "taken: bars 5\u20138, repeat", "measure": 5,
             "piece": "First"}]
    df = check_places(regions=regions, repeats=reps, pieces=session["pieces"], beats=session["beats"])
    assert list(df["start"]) == [40.0, 100.0, 143.5]
    merged = df.iloc[1]
    assert merged["end"] == 106.0
    assert merged["what"] == "placement unsure: 2.5 s of recording match the score poorly; low local confidence"
    assert "score_qn" not in " ".join(df["what"])                    # one clock on the page
    assert df.iloc[2]["piece"] == "First" and df.iloc[2]["bars"] == "70"  # nearest piece; its last bar
    # 4 beats per bar from 2.0 s at 0.5 s per beat (the fixture): bar = (t - 2) // 2 + 1, 100-106 s: 50-53
    assert merged["bars"] == "50\u201353"
    assert "repeat taken" in df.iloc[0]["what"]


@pytest.fixture(scope="module")
def silent(tmp_path_factory):
    p = tmp_path_factory.mktemp("click") / "silent.wav"
    sf.write(p, np.zeros((44100 * 3, 2), dtype=np.float32), 44100, subtype="PCM_16")
    return p


def test_clicks_at_the_placed_samples_with_their_pitch(silent):
    bars, bounds = [0.5, 1.5, 2.5], [1.0, 2.0]
    data = click_track(silent, bars_s=bars, boundaries_s=bounds + [float("nan")], block_s=0.7)
    assert data == click_track(silent, bars_s=bars, boundaries_s=bounds)      # same bytes again
    y, sr = sf.read(io.BytesIO(data), dtype="float64")
    info = sf.info(io.BytesIO(data))
    assert sr == MAX_CHECK_RATE_HZ and y.ndim == 1 and info.format == "FLAC" and info.subtype == "PCM_16"
    assert y.size == 3 * sr
    on = np.flatnonzero((np.abs(y) > 1e-4) & (np.r_[0.0, np.abs(y[:-1])] <= 1e-4))
    starts = [i for i in on if not np.any(np.abs(y[max(i - 200, 0):i]) > 1e-4)]
    expect = sorted(round(t * sr) for t in bars + bounds)
    assert np.all(np.abs(np.array(starts) - expect) <= 1)            # sine starts at 0: first sample may round to 0
    for t, kind in [(0.5, "bar"), (1.0, "boundary")]:
        seg = y[round(t * sr): round(t * sr) + 2048]
        spec = np.abs(np.fft.rfft(seg * np.hanning(seg.size)))
        f = np.fft.rfftfreq(seg.size, 1 / sr)[np.argmax(spec)]
        assert f == pytest.approx(CLICK_SETTINGS[kind]["frequency_hz"], abs=sr / 2048)
    assert np.max(np.abs(y[round(1.0 * sr):round(1.0 * sr) + 400])) > np.max(np.abs(y[round(0.5 * sr):round(0.5 * sr) + 400]))


def test_mix_is_limited(tmp_path):
    p = tmp_path / "loud.wav"
    sf.write(p, np.full(22050, 0.99, dtype=np.float32), 22050, subtype="FLOAT")
    y, _ = sf.read(io.BytesIO(click_track(p, bars_s=[0.1], boundaries_s=[0.1])))
    assert np.max(np.abs(y)) <= 1.0
