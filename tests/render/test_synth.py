"""Synthesis and room: onsets in the audio match the ground truth, pitch, timbres, reproducibility."""

from __future__ import annotations

import librosa
import mir_eval
import numpy as np
import pandas as pd
import pytest

from stimkit.errors import InputError
from stimkit.render import render_score
from stimkit.render.room import add_room
from stimkit.render.sounds import sync_click
from stimkit.render.synth import TIMBRES, piano_partials, synthesize

SR = 22050


def _one(pitch, *, onset_s=0.1, dur_s=1.0, velocity=90):
    return pd.DataFrame({"onset_s": [onset_s], "offset_s": [onset_s + dur_s], "pitch": [pitch],
                         "velocity": [velocity]})


# the timbres with quick attacks; the slow ones (bowed 100-300 ms, winds) have no sharp onset for a
# spectral-flux detector by design and are checked in test_evaluation_material.py
QUICK_ATTACK = ("piano", "organ", "strings")


@pytest.fixture(scope="module")
def rendered(melody_score):
    return {t: render_score(melody_score, seed=4, timbre=t, start_s=0.5) for t in QUICK_ATTACK}


@pytest.mark.parametrize("timbre", QUICK_ATTACK)
def test_detected_onsets_match_ground_truth(rendered, timbre):
    # mir_eval.onset.f_measure with its standard 50 ms window (MIREX onset practice) against
    # librosa's onset detector, on the rendered signal with reverberation and noise
    y, perf = rendered[timbre]
    est = librosa.onset.onset_detect(y=y, sr=SR, units="time")
    f, p, r = mir_eval.onset.f_measure(perf.notes["onset_s"].to_numpy(), est, window=0.05)
    if timbre == "strings":
        # vibrato makes a spectral-flux detector fire between notes too (Bello et al. 2005, soft
        # onsets of bowed strings): every note must still be found, extra detections are allowed
        assert r >= 0.9
    else:
        assert f >= 0.9


@pytest.mark.parametrize("timbre", TIMBRES)
def test_first_sample_of_a_note_is_the_ground_truth_sample(timbre):
    # the contract: a note's sound starts at sample round(onset_s * sr)
    onset = 0.123456
    y = synthesize(_one(69, onset_s=onset), sr=SR, timbre=timbre, seed=1)
    k = int(round(onset * SR))
    assert np.all(y[:k] == 0) and y[k] != 0


def test_piano_a4_sounds_at_440_hz():
    # A4 = MIDI 69 = 440 Hz (ISO 16); librosa.pyin as the reference pitch tracker. The piano's
    # inharmonic, stretched fundamental may sit a few cents off; allow 10 cents.
    y = synthesize(_one(69, onset_s=0.0, dur_s=0.5), sr=SR, timbre="piano", seed=0)[: SR // 2]
    f0, voiced, _ = librosa.pyin(y, fmin=300, fmax=600, sr=SR, frame_length=2048)
    cents = 1200 * np.log2(np.nanmedian(f0[voiced]) / 440.0)
    assert abs(cents) < 10


@pytest.mark.parametrize("pitch", [57, 69, 81])
def test_organ_pitch_by_spectral_peak(pitch):
    # equal temperament, A4 = 440 Hz: f = 440 * 2 ** ((p - 69) / 12); strongest spectral peak of the
    # organ's foundation rank, found on a 1 s window zero-padded to 2**18 points (0.08 Hz bins)
    y = synthesize(_one(pitch, onset_s=0.0, dur_s=1.2), sr=SR, timbre="organ", seed=0)[SR // 10: SR // 10 + SR]
    spec = np.abs(np.fft.rfft(y * np.hanning(y.size), 1 << 18))
    f_peak = np.argmax(spec) * SR / (1 << 18)
    assert f_peak == pytest.approx(440 * 2 ** ((pitch - 69) / 12), rel=0.001)


def test_piano_partials_are_stretched_like_a_stiff_string():
    # Fletcher, Blackham & Stratton (1962): f_n = n f0 sqrt(1 + B n^2), so partial 10 of C3 lies
    # above 10 x the fundamental; measure it in the signal
    pitch = 48
    y = synthesize(_one(pitch, onset_s=0.0, dur_s=1.5), sr=SR, timbre="piano", seed=0)[: SR]
    spec = np.abs(np.fft.rfft(y * np.hanning(y.size), 1 << 18))
    freqs = np.fft.rfftfreq(1 << 18, 1 / SR)
    f, _ = piano_partials(pitch, sr=SR)

    def peak_near(fc):
        sel = (freqs > fc * 0.98) & (freqs < fc * 1.02)
        return freqs[sel][np.argmax(spec[sel])]

    f1, f10 = peak_near(f[0]), peak_near(f[9])
    assert f10 / f1 > 10.0 * 1.001           # sharper than harmonic
    assert f10 / f1 == pytest.approx(f[9] / f[0], rel=5e-4)


def test_the_two_timbres_differ_clearly():
    # spectral centroid (librosa) of a held C4 chord and the energy decay: a piano tone dies away,
    # organ and bowed-string tones are steady (Fletcher & Rossing 1998, ch. 10, 12 and 17)
    notes = pd.DataFrame({"onset_s": [0.0] * 3, "offset_s": [2.0] * 3, "pitch": [60, 64, 67],
                          "velocity": [100] * 3})
    out = {}
    for t in TIMBRES:
        y = synthesize(notes, sr=SR, timbre=t, seed=0)
        cen = librosa.feature.spectral_centroid(y=y[: 2 * SR], sr=SR)[0]
        early = np.sqrt(np.mean(y[int(0.1 * SR): int(0.4 * SR)] ** 2))
        late = np.sqrt(np.mean(y[int(1.6 * SR): int(1.9 * SR)] ** 2))
        out[t] = (np.median(cen), 20 * np.log10(late / early))
    for a, b in (("piano", "organ"), ("piano", "strings"), ("organ", "strings")):
        assert abs(out[a][0] - out[b][0]) / min(out[a][0], out[b][0]) > 0.2
    assert out["piano"][1] < -6.0 and abs(out["organ"][1]) < 1.0 and abs(out["strings"][1]) < 1.5


def test_louder_piano_notes_are_brighter():
    # velocity-dependent brightness (Fletcher & Rossing 1998, ch. 12): centroid rises with velocity;
    # the 30 % margin between pp-ish and ff-ish notes is the project's choice (common practice)
    cen = []
    for v in (30, 110):
        y = synthesize(_one(60, onset_s=0.0, velocity=v), sr=SR, timbre="piano", seed=0)
        cen.append(np.median(librosa.feature.spectral_centroid(y=y[: SR // 2], sr=SR)[0]))
    assert cen[1] > 1.3 * cen[0]


def test_synthesis_is_reproducible(melody_score):
    from stimkit.render.performance import perform

    notes = perform(melody_score, seed=1).notes.iloc[:10]
    a = synthesize(notes, seed=3)
    b = synthesize(notes, seed=3)
    c = synthesize(notes, seed=4)
    assert a.dtype == np.float32 and np.array_equal(a, b) and not np.array_equal(a, c)
    from stimkit.render.synth import PEAK_LIMIT

    assert PEAK_LIMIT < 1.0                          # below full scale: no clipping (PCM range)
    assert np.max(np.abs(a)) <= PEAK_LIMIT + 1e-6


def test_room_keeps_the_dry_onset():
    # the dry path is at delay 0: with reverberation alone, the output starts on the same sample
    # and its cross-correlation with the dry signal peaks at lag 0
    y = np.zeros(SR, dtype=np.float32)
    k = 5000
    click = sync_click(SR)
    y[k:k + click.size] = click
    wet = add_room(y, SR, rt60_s=0.8, wet=0.5, noise_db=-np.inf, seed=1)
    assert np.flatnonzero(np.abs(wet) > 1e-7)[0] == k
    xc = np.correlate(wet[: k + 2000], y[: k + 2000], mode="full")
    assert np.argmax(np.abs(xc)) - (k + 2000 - 1) == 0
    # reverberation lengthens the sound: energy remains 0.3 s later
    assert np.sqrt(np.mean(wet[k + 6000: k + 8000] ** 2)) > 1e-3


def test_room_noise_level():
    # the added noise has the requested RMS in dBFS
    y = add_room(np.zeros(2 * SR, dtype=np.float32), SR, noise_db=-40.0, seed=2)
    assert 20 * np.log10(np.sqrt(np.mean(y.astype(np.float64) ** 2))) == pytest.approx(-40.0, abs=0.01)


def test_bad_input_is_refused():
    with pytest.raises(InputError):
        synthesize(_one(60), timbre="kazoo")
    with pytest.raises(InputError):
        synthesize(pd.DataFrame({"onset_s": [0.0], "pitch": [60]}))


def test_render_score_ground_truth_is_on_the_sample_grid(melody_score):
    # render_score snaps onset_s to k / sr; without the room, sample k is the note's first
    # non-zero sample (checked for the first note, which sounds alone)
    y, perf = render_score(melody_score, seed=8, room=False, start_s=0.25)
    k = perf.notes["onset_s"].to_numpy() * SR
    np.testing.assert_allclose(k, np.rint(k), atol=1e-6)
    first = int(round(k[0]))
    assert np.all(y[:first] == 0) and y[first] != 0
    assert perf.settings["sr"] == SR and perf.settings["timbre"] == "piano"
