"""Scenario sounds: sync click onset, babble syllable rate and voicing, applause envelope, pink room tone."""

from __future__ import annotations

import librosa
import numpy as np
import pytest
from scipy.signal import hilbert, welch

from stimkit.errors import InputError
from stimkit.render.sounds import applause, babble, room_tone, sync_click

SR = 22050


@pytest.mark.parametrize("kind", ["click", "burst"])
def test_sync_mark_onset_is_sample_zero(kind):
    y = sync_click(SR, kind=kind, level_db=-6.0)
    peak = 10 ** (-6.0 / 20)
    assert y[0] == pytest.approx(peak, rel=1e-6) and np.argmax(np.abs(y)) == 0
    # the documented default lengths: a 5 ms click, a 50 ms burst (stimkit.render.sounds.sync_click)
    assert y.size == int(round((0.005 if kind == "click" else 0.05) * SR))
    # the burst's carrier is freq_hz: spectral peak of the 50 ms burst within one 20 Hz bin
    if kind == "burst":
        spec = np.abs(np.fft.rfft(y, SR))
        assert np.argmax(spec) == pytest.approx(1000, abs=20)


def test_sync_click_placed_in_silence_is_found_on_its_sample():
    # inserting the click at sample k puts the first non-zero sample at k
    k = 12345
    y = np.zeros(SR, dtype=np.float32)
    c = sync_click(SR)
    y[k:k + c.size] = c
    assert np.flatnonzero(y)[0] == k


def _envelope_modulation_peak_hz(y, *, rate_hz=100):
    """Peak of the Welch spectrum of the Hilbert envelope (resampled to ``rate_hz``), 0.5-20 Hz."""
    env = np.abs(hilbert(y.astype(np.float64)))
    env = librosa.resample(env, orig_sr=SR, target_sr=rate_hz)
    f, p = welch(env - env.mean(), fs=rate_hz, nperseg=4 * rate_hz)
    sel = (f >= 0.5) & (f <= 20)
    return f[sel][np.argmax(p[sel])]


@pytest.fixture(scope="module")
def one_voice():
    return babble(SR, 8.0, seed=3, n_voices=1, level_db=-23.0)


def test_babble_modulation_peaks_near_the_syllable_rate():
    # the envelope modulation spectrum of running speech peaks at 3-5 Hz, the syllable rate
    # (Houtgast & Steeneken 1985); allow 2.5-7 Hz for a synthetic 10 s sample
    y = babble(SR, 10.0, seed=1)
    assert 2.5 <= _envelope_modulation_peak_hz(y) <= 7.0
    # RMS level as asked
    assert 20 * np.log10(np.sqrt(np.mean(y.astype(np.float64) ** 2))) == pytest.approx(-23.0, abs=0.01)


def test_babble_is_voiced_at_a_speaking_pitch(one_voice):
    # adult speaking pitch lies roughly between 80 and 300 Hz (value from memory, common
    # practice); librosa.pyin finds voicing in a good share of frames
    f0, voiced, _ = librosa.pyin(one_voice[: 3 * SR], fmin=70, fmax=350, sr=SR, frame_length=1024)
    assert np.mean(voiced) > 0.3
    assert 80 <= np.nanmedian(f0[voiced]) <= 300


def test_babble_energy_is_in_the_speech_band(one_voice):
    # long-term speech spectra carry most energy below 4 kHz (ANSI S3.5 band importance, common
    # practice)
    f, p = welch(one_voice, fs=SR, nperseg=2048)
    assert p[f < 4000].sum() / p.sum() > 0.9


def test_applause_rises_and_decays():
    y = applause(SR, 8.0, seed=2)
    rms = librosa.feature.rms(y=y, frame_length=2048, hop_length=512)[0]
    t = librosa.frames_to_time(np.arange(rms.size), sr=SR, hop_length=512)
    start, middle, end = rms[t < 0.15].mean(), rms[(t > 2) & (t < 4)].mean(), rms[t > 7.5].mean()
    assert start < 0.7 * middle and end < 0.7 * middle
    # dense claps (40 clappers at 2-5 Hz, Neda et al. 2000): no 50 ms stretch in the middle falls
    # 12 dB below the mean level (a lone clapper would leave silent gaps of 150 ms and more)
    mid = y[2 * SR: 4 * SR].astype(np.float64).reshape(-1, 1050)
    frame_db = 10 * np.log10(np.mean(mid ** 2, axis=1) / np.mean(mid ** 2))
    assert frame_db.min() > -12
    # claps are broadband noise bursts with resonances around 1-2.5 kHz (Repp 1987)
    assert 700 < np.median(librosa.feature.spectral_centroid(y=y, sr=SR)[0]) < 4000


def test_room_tone_is_pink_at_the_asked_level():
    y = room_tone(SR, 20.0, level_db=-45.0, seed=4)
    assert 20 * np.log10(np.sqrt(np.mean(y.astype(np.float64) ** 2))) == pytest.approx(-45.0, abs=0.01)
    # pink noise: power spectral density proportional to 1/f, i.e. -3.01 dB per octave (definition)
    f, p = welch(y, fs=SR, nperseg=8192)
    sel = (f > 50) & (f < 5000)
    slope = np.polyfit(np.log2(f[sel]), 10 * np.log10(p[sel]), 1)[0]
    assert slope == pytest.approx(-3.01, abs=0.5)


def test_sounds_are_reproducible():
    assert np.array_equal(babble(SR, 1.0, seed=5), babble(SR, 1.0, seed=5))
    assert np.array_equal(applause(SR, 1.0, seed=5), applause(SR, 1.0, seed=5))
    assert not np.array_equal(room_tone(SR, 1.0, seed=5), room_tone(SR, 1.0, seed=6))
    for y in (babble(SR, 1.0, seed=5), applause(SR, 1.0, seed=5), room_tone(SR, 1.0)):
        assert y.dtype == np.float32 and y.size == SR


def test_bad_options_are_refused():
    with pytest.raises(InputError):
        sync_click(SR, kind="beep")
    with pytest.raises(InputError):
        babble(SR, -1.0, seed=1)
