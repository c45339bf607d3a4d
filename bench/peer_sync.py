"""The peer: the Sync Toolbox's score-to-audio pipeline, run as its tutorial shows.

The tutorial ``sync_audio_score_full.ipynb`` of the ``synctoolbox`` package (Müller et al. 2021):
pitch features from a note list at 50 Hz (``df_to_pitch_features``), quantized chroma and DLNCO
onset features on both sides (Ewert, Müller & Grosche 2009), tuning estimated from the audio,
the best chroma shift found on 1 Hz CENS, then memory-restricted multiscale DTW
(``sync_via_mrmsdtw``, Prätzlich, Driedger & Müller 2016) with step weights (1.5, 1.5, 2.0) and
``threshold_rec = 10**6``, and the path made strictly monotonic. The note list is the score's
notes at its nominal tempo (``tempo_map``), as the tutorial's CSV from a MIDI file is.

Bench only. ``synctoolbox`` pins older music21/numba/pandas than stimkit uses, so it is installed
without its pins: ``pip install --no-deps synctoolbox libfmp pretty_midi mido`` and
``pip install ipython`` (libfmp imports it); see DEVELOPERS.md.

References
----------
.. [1] M. Müller, Y. Özer, M. Krause, T. Prätzlich and J. Driedger, "Sync Toolbox: a Python
   package for efficient, robust, and accurate music synchronization", JOSS 6(64), 2021.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

FEATURE_RATE = 50
STEP_WEIGHTS = np.array([1.5, 1.5, 2.0])
THRESHOLD_REC = 10 ** 6


def available() -> bool:
    try:
        import synctoolbox.dtw.mrmsdtw  # noqa: F401
        return True
    except Exception:   # not installed, or its libfmp import chain broken
        return False


@dataclass
class PeerResult:
    """The few attributes :func:`stimkit.render.evaluate.score_notes` reads."""

    score: object
    timemap: object
    notes: pd.DataFrame


def align(score, wav, *, force: bool = True) -> PeerResult:
    """Align ``score`` (ScoreModel) to ``wav`` with the Sync Toolbox tutorial pipeline."""
    import librosa
    from synctoolbox.dtw.mrmsdtw import sync_via_mrmsdtw
    from synctoolbox.dtw.utils import compute_optimal_chroma_shift, make_path_strictly_monotonic, \
        shift_chroma_vectors
    from synctoolbox.feature.chroma import pitch_to_chroma, quantize_chroma, quantized_chroma_to_CENS
    from synctoolbox.feature.csv_tools import df_to_pitch_features, df_to_pitch_onset_features
    from synctoolbox.feature.dlnco import pitch_onset_features_to_DLNCO
    from synctoolbox.feature.pitch import audio_to_pitch_features
    from synctoolbox.feature.pitch_onset import audio_to_pitch_onset_features
    from synctoolbox.feature.utils import estimate_tuning

    from stimkit.timemap import TimeMap

    fs = 22050
    audio, _ = librosa.load(str(wav), sr=fs)
    n = score.notes
    tm = score.tempo_map
    start = np.asarray(tm(n["score_qn"].to_numpy(np.float64)), dtype=np.float64)
    end = np.asarray(tm((n["score_qn"] + n["duration_qn"]).to_numpy(np.float64)), dtype=np.float64)
    df = pd.DataFrame({"start": start, "duration": np.maximum(end - start, 0.01),
                       "pitch": n["pitch"].astype(int).to_numpy(),
                       "velocity": n["velocity"].astype(float).to_numpy(), "instrument": "piano"})
    tuning = estimate_tuning(audio, fs)
    f_pitch = audio_to_pitch_features(f_audio=audio, Fs=fs, tuning_offset=tuning,
                                      feature_rate=FEATURE_RATE, verbose=False)
    chroma_a = quantize_chroma(f_chroma=pitch_to_chroma(f_pitch=f_pitch))
    onset_a = audio_to_pitch_onset_features(f_audio=audio, Fs=fs, tuning_offset=tuning, verbose=False)
    dlnco_a = pitch_onset_features_to_DLNCO(f_peaks=onset_a, feature_rate=FEATURE_RATE,
                                            feature_sequence_length=chroma_a.shape[1], visualize=False)
    f_pitch_s = df_to_pitch_features(df, feature_rate=FEATURE_RATE)
    chroma_s = quantize_chroma(f_chroma=pitch_to_chroma(f_pitch=f_pitch_s))
    dlnco_s = pitch_onset_features_to_DLNCO(f_peaks=df_to_pitch_onset_features(df), feature_rate=FEATURE_RATE,
                                            feature_sequence_length=chroma_s.shape[1], visualize=False)
    cens_a = quantized_chroma_to_CENS(chroma_a, 201, 50, FEATURE_RATE)[0]
    cens_s = quantized_chroma_to_CENS(chroma_s, 201, 50, FEATURE_RATE)[0]
    shift = compute_optimal_chroma_shift(cens_a, cens_s)
    chroma_s = shift_chroma_vectors(chroma_s, shift)
    dlnco_s = shift_chroma_vectors(dlnco_s, shift)
    wp = sync_via_mrmsdtw(f_chroma1=chroma_a, f_onset1=dlnco_a, f_chroma2=chroma_s, f_onset2=dlnco_s,
                          input_feature_rate=FEATURE_RATE, step_weights=STEP_WEIGHTS,
                          threshold_rec=THRESHOLD_REC, verbose=False)
    wp = make_path_strictly_monotonic(wp)
    rec = wp[0] / FEATURE_RATE
    nominal = wp[1] / FEATURE_RATE
    qn = np.asarray(tm.inverse()(nominal), dtype=np.float64)
    keep = np.r_[True, np.diff(qn) > 1e-9] & np.r_[True, np.diff(rec) > 1e-9]
    timemap = TimeMap(qn[keep], rec[keep], src="score_qn", dst="recording")
    pos = np.unique(n["score_qn"].to_numpy(np.float64))
    notes = pd.DataFrame({"score_qn": pos, "recording": timemap(pos), "confidence": np.nan})
    return PeerResult(score=score, timemap=timemap, notes=notes)
