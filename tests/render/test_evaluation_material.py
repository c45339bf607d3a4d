"""The evaluation material: scoring helper, slow-attack timbres, voice, hall, variants, performers.

External references: mir_eval.alignment (the scoring figures), librosa.pyin (pitch, A4 = 440 Hz),
the Schroeder backward integration of an impulse response (ISO 3382-1 reverberation time from
the decay between -5 and -35 dB), music21's own reading of MusicXML ``<transpose>``.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

SR = 22050


# -- scoring ----------------------------------------------------------------------------------

def _fake_result(score, times_of_qn, conf=0.95):
    from stimkit.timemap import TimeMap

    q = np.unique(score.notes["score_qn"].to_numpy(np.float64))
    tm = TimeMap(q, times_of_qn(q), src="score_qn", dst="recording")
    return SimpleNamespace(score=score, timemap=tm,
                           notes=pd.DataFrame({"score_qn": q, "confidence": conf}))


def test_scoring_matches_mir_eval_and_counts_a_missing_pass(melody_score):
    import mir_eval

    from stimkit.render.evaluate import note_truth, score_notes, summarize
    from stimkit.render.performance import perform

    perf = perform(melody_score, seed=4)
    truth = note_truth(perf, melody_score)
    res = _fake_result(melody_score, lambda q: perf.timemap(q) + 0.02)
    s = score_notes(truth, res)
    d = summarize(s)
    ref, est = s["truth_s"].to_numpy(), s["est_s"].to_numpy()
    med, mean = mir_eval.alignment.absolute_error(ref, est)     # mir_eval is the reference
    assert d["via_mir_eval"] and d["median_s"] == pytest.approx(med) and d["mean_s"] == pytest.approx(mean)
    assert d["within_100"] == pytest.approx(mir_eval.alignment.percentage_correct(ref, est, window=0.1))
    assert d["missing"] == 0 and d["over_2s"] == 0
    # the alignment's score lacks pass 1 of the first bar: its notes are gross errors, not dropped
    other = SimpleNamespace(**vars(res))
    m = melody_score.measures.copy()
    m.loc[0, "pass"] = 2
    other.score = SimpleNamespace(measures=m)
    s2 = score_notes(truth, other)
    first_bar = int((truth["measure"] == m.loc[0, "measure"]).sum())
    d2 = summarize(s2)
    assert d2["missing"] == first_bar > 0 and d2["over_2s"] >= first_bar and len(s2) == len(truth)
    assert not d2["via_mir_eval"]


def test_calibration_figures_by_hand():
    from stimkit.render.evaluate import calibration_figures

    err = np.array([0.01, 0.05, 0.5, 2.0, np.inf, 0.02])
    conf = np.array([0.95, 0.92, 0.3, 0.9, np.nan, 0.2])
    c = calibration_figures(err, conf)
    assert c["n_sure"] == 3 and c["sure_within_100"] == pytest.approx(2 / 3)   # 0.95, 0.92 ok; 0.9 -> 2 s
    assert c["n_off"] == 3 and c["off_flagged"] == pytest.approx(1 / 3)         # only the 0.3 is low
    assert c["spearman"] < 0


# -- timbres ----------------------------------------------------------------------------------

@pytest.mark.parametrize("timbre", ["bowed", "clarinet", "flute", "horn"])
def test_slow_timbres_start_on_their_sample_and_sound_at_pitch(timbre):
    import librosa

    from stimkit.render.synth import synthesize

    notes = pd.DataFrame({"onset_s": [0.25], "offset_s": [1.75], "pitch": [69], "velocity": [90],
                          "attack_s": [0.2]})
    y = synthesize(notes, sr=SR, timbre=timbre, seed=1)
    assert int(np.flatnonzero(y)[0]) == round(0.25 * SR)       # ground truth to the sample
    f0, voiced, _ = librosa.pyin(y[int(0.6 * SR):int(1.6 * SR)], fmin=200, fmax=900, sr=SR)
    cents = 1200 * np.log2(np.nanmedian(f0[voiced]) / 440.0)   # A4 = 440 Hz (ISO 16)
    assert abs(cents) < 30


def test_bowed_attack_is_slow():
    from stimkit.render.synth import synthesize

    notes = pd.DataFrame({"onset_s": [0.1], "offset_s": [1.5], "pitch": [62], "velocity": [90],
                          "attack_s": [0.25]})
    y = synthesize(notes, sr=SR, timbre="bowed", seed=2)
    env = np.sqrt(np.convolve(y.astype(float) ** 2, np.ones(220) / 220, mode="same"))
    sustain = np.median(env[int(0.6 * SR):int(1.4 * SR)])
    t90 = (np.flatnonzero(env >= 0.9 * sustain)[0] / SR) - 0.1
    assert 0.1 <= t90 <= 0.35     # task: bowed attacks of 100-300 ms


def test_voice_sings_the_line_with_legato_glides():
    import librosa

    from stimkit.render.voice import sing

    notes = pd.DataFrame({"onset_s": [0.2, 1.2], "offset_s": [1.2, 2.2], "pitch": [69, 72],
                          "velocity": [90, 90]})
    y = sing(notes, sr=SR, seed=3, n_out=int(2.6 * SR))
    assert int(np.flatnonzero(y)[0]) == round(0.2 * SR)
    f0, voiced, _ = librosa.pyin(y, fmin=200, fmax=900, sr=SR, frame_length=2048, hop_length=256)
    t = librosa.times_like(f0, sr=SR, hop_length=256)
    c1 = np.nanmedian(f0[(t > 0.6) & (t < 1.1) & voiced])
    c2 = np.nanmedian(f0[(t > 1.6) & (t < 2.1) & voiced])
    assert abs(1200 * np.log2(c1 / 440.0)) < 40 and abs(1200 * np.log2(c2 / 523.25)) < 40  # A4, C5
    # legato: the second note glides in (no silence between the notes)
    gap = np.abs(y[int(1.15 * SR):int(1.3 * SR)])
    assert gap.max() > 0.1 * np.abs(y).max()


# -- hall -------------------------------------------------------------------------------------

def _t30(h, sr, band=None):
    from scipy.signal import butter, sosfilt

    if band is not None:
        h = sosfilt(butter(4, band, btype="bandpass", fs=sr, output="sos"), h)
    e = np.cumsum((h.astype(float) ** 2)[::-1])[::-1]      # Schroeder backward integration
    db = 10 * np.log10(e / e[0])
    i5, i35 = np.argmax(db <= -5), np.argmax(db <= -35)
    return 2.0 * (i35 - i5) / sr                            # T30: 60 dB extrapolated from 30 dB


def test_hall_reverberation_time_and_frequency_dependent_decay():
    from stimkit.render.room import hall_response

    h = hall_response(SR, rt60_s=2.2, seed=5)
    assert _t30(h, SR, (700, 1400)) == pytest.approx(2.2, rel=0.2)   # ISO 3382-1, mid band
    assert _t30(h, SR, (5000, 8000)) < 0.7 * _t30(h, SR, (700, 1400))  # treble decays faster


def test_hall_keeps_the_dry_onset():
    from stimkit.render.room import add_hall

    y = np.zeros(SR, np.float32)
    y[1000:] = 0.5
    out = add_hall(y, SR, rt60_s=2.0, wet=0.5, seed=1)
    # before the dry onset only FFT round-off (< -120 dBFS); the dry path sounds at its sample
    assert int(np.flatnonzero(np.abs(out) > 1e-6)[0]) == 1000
    assert out[1000] == pytest.approx(0.25, abs=1e-5)


# -- variants ---------------------------------------------------------------------------------

def test_transposing_part_reads_back_at_concert_pitch_in_music21():
    import music21

    from stimkit.render.variants import concert_pitch, excerpt, read_musicxml, transposing_part

    src = read_musicxml(music21.corpus.getWork("bach/bwv66.6"))   # music21 corpus, used in place
    clean = excerpt(src, 4)
    written = transposing_part(clean, "P1", "clarinet_bb")
    a = music21.converter.parseData(clean, format="musicxml").parts[0]
    b = music21.converter.parseData(written, format="musicxml").parts[0]
    pa = [p.midi for p in a.flatten().pitches]
    pb_written = [p.midi for p in b.flatten().pitches]
    pb_sounding = [p.midi for p in b.toSoundingPitch().flatten().pitches]   # music21 applies <transpose>
    assert pb_written == [p + 2 for p in pa] and pb_sounding == pa
    back = music21.converter.parseData(concert_pitch(written), format="musicxml").parts[0]
    assert [p.midi for p in back.flatten().pitches] == pa


def test_out_of_step_bars_no_longer_add_up():
    import music21

    from stimkit.render.variants import excerpt, out_of_step, read_musicxml

    clean = excerpt(read_musicxml(music21.corpus.getWork("bach/bwv66.6")), 8)
    bad, done = out_of_step(clean, [("P4", 0.5, "drop"), ("P1", 0.3, "double")])
    assert len(done) == 2
    s = music21.converter.parseData(bad, format="musicxml")
    lens = [[m.duration.quarterLength for m in p.getElementsByClass("Measure")] for p in s.parts]
    ref = music21.converter.parseData(clean, format="musicxml")
    ref_lens = [m.duration.quarterLength for m in ref.parts[0].getElementsByClass("Measure")]
    assert sum(lens[3]) < sum(ref_lens) and sum(lens[0]) > sum(ref_lens)   # P4 short, P1 long


def test_misread_score_keeps_bar_lengths_and_changes_what_it_says():
    """The optical-music-recognition variant: parts unnamed, tempo gone, some pitches changed,
    every bar still as long as in the clean file (misread notes become rests of the same length)."""
    import music21

    from stimkit.render.variants import excerpt, misread, read_musicxml

    clean = excerpt(read_musicxml(music21.corpus.getWork("bach/bwv66.6")), 8)   # corpus, in place
    bad, lines = misread(clean, seed=3, rate=0.1)
    a = music21.converter.parseData(clean, format="musicxml")
    b = music21.converter.parseData(bad, format="musicxml")
    assert [p.partName for p in b.parts] == [f"Part {k}" for k in range(1, 5)]
    assert not b.recurse().getElementsByClass(music21.tempo.MetronomeMark)
    for pa, pb in zip(a.parts, b.parts):
        assert ([m.duration.quarterLength for m in pa.getElementsByClass("Measure")]
                == [m.duration.quarterLength for m in pb.getElementsByClass("Measure")])
    ma = [n.pitch.midi for n in a.parts[0].recurse().notes]
    mb = [n.pitch.midi for n in b.parts[0].recurse().notes]
    assert ma != mb and any("wrong clef" in ln for ln in lines)


# -- performers who ignore the marks ----------------------------------------------------------

def test_tempo_factor_rubato_and_melody_lead(melody_score):
    from stimkit.render.performance import perform

    base = perform(melody_score, seed=9)
    slow = perform(melody_score, seed=9, tempo_factor=0.4)
    q = melody_score.total_qn
    # the same expressive curve, 2.5 times as long
    assert float(slow.timemap(q)) == pytest.approx(float(base.timemap(q)) / 0.4, rel=1e-9)
    ru = perform(melody_score, seed=9, rubato=0.3, agogic_s=0.1, final_rit_qn=8.0)
    assert ru.settings["rubato"] == 0.3 and float(ru.timemap(q)) != float(base.timemap(q))
    assert np.all(np.diff(ru.timemap(np.linspace(0, q, 400))) > 0)
