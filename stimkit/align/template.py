"""Score-side alignment features built directly from the notes, in nominal time.

:func:`score_features` turns the notes of a :class:`~stimkit.score.model.ScoreModel` (performed
order, repeats already expanded by the parser) into the same two features the recording gets
(:mod:`stimkit.align.chroma`), at the same frame rate:

- a chroma template: each note adds the energy of its first ``N_PARTIALS`` harmonics (amplitude
  ``PARTIAL_DECAY ** (h - 1)``, harmonic ``h`` at pitch ``p + 12 log2 h`` rounded to a semitone)
  to its pitch classes while it sounds, with an exponential decay (``DECAY_S``) and a short
  release after its end; velocity sets the level (40 dB over 1..127);
- an onset template: at each note start, the log-compressed level of the same partials as a
  sub-frame impulse (split linearly between the two nearest frames), then the same DLNCO
  normalisation and decay as the audio side.

Why from the notes and not from a rendering by the project's synthesizer: it costs a few
milliseconds instead of a synthesis and a CQT, it does not tie the score side to one timbre (the
recording is a real instrument whose timbre we do not know; the test renders with a different
one), and it places every onset exactly, without the attack shape of a synthetic sound.

Conventions
-----------
- ``nominal`` time: frame ``k`` is centred at ``k / rate_hz - HEAD_S`` seconds of the score's
  tempo map (``score.tempo_map``, score_qn -> nominal): the template starts and ends with a second
  of silence, so that the open start of the path meets the silence-to-music edge of the recording
  instead of sliding past the first chord. Use ``score.tempo_map.inverse()`` to go back to
  ``score_qn``.
- An onset impulse is placed half a frame late (at ``t * rate_hz + 0.5`` frames), matching the
  audio side, whose backward difference of frame energies puts an onset between two frame
  centres.

References
----------
.. [1] S. Ewert, M. Müller, P. Grosche. "High resolution audio synchronization using chroma
   onset features", ICASSP 2009.
.. [2] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 3.1.
"""

from __future__ import annotations

import numpy as np

from .chroma import RATE_HZ, AlignFeatures, dlnco, finish_chroma

__all__ = ["score_features", "N_PARTIALS", "PARTIAL_DECAY", "DECAY_S", "HEAD_S", "TAIL_S"]

N_PARTIALS = 6
PARTIAL_DECAY = 0.55
DECAY_S = 1.5          # energy decay time constant while a note is held
RELEASE_S = 0.08
HEAD_S = 1.0           # seconds of silence before score_qn 0 (frame 0 is at -HEAD_S nominal)
TAIL_S = 1.0           # seconds of silence after the last note


def _partials(pitch: int):
    h = np.arange(1, N_PARTIALS + 1)
    pcs = (pitch + np.round(12 * np.log2(h)).astype(int)) % 12
    amps = PARTIAL_DECAY ** (h - 1)
    return pcs, amps


def score_features(score, *, rate_hz: float = RATE_HZ, time_scale: float = 1.0) -> AlignFeatures:
    """Chroma and chroma-onset templates of ``score`` at ``rate_hz`` in nominal time.

    Parameters
    ----------
    score : ScoreModel
        Parsed score with at least one note.
    rate_hz : float
        Frame rate, the same as the recording side.
    time_scale : float
        Stretch of the nominal time axis (``k``: nominal second ``t`` is placed at ``k * t``; 2 is
        a performance at half the notated tempo). The silent head and tail stay ``HEAD_S`` and
        ``TAIL_S`` seconds; note decay and release times are not stretched.

    Returns
    -------
    AlignFeatures
        ``start_s = 0`` (nominal seconds), ``meta['nominal_s']`` the nominal length.
    """
    notes = score.notes
    tm = score.tempo_map
    # nominal seconds shifted so that frame 0 is HEAD_S before score_qn 0
    k = float(time_scale)
    on_s = k * np.asarray(tm(notes["score_qn"].to_numpy(np.float64)), dtype=np.float64) + HEAD_S
    off_s = k * np.asarray(tm((notes["score_qn"] + notes["duration_qn"]).to_numpy(np.float64)), dtype=np.float64) + HEAD_S
    off_s = np.maximum(off_s, on_s + 0.03)
    pitch = notes["pitch"].to_numpy().astype(int)
    vel = notes["velocity"].to_numpy(np.float64) if "velocity" in notes else np.full(len(notes), 80.0)
    vel = np.where(np.isfinite(vel), vel, 80.0)
    amp = 10 ** ((np.clip(vel, 1, 127) - 127) / 126 * 40 / 20)   # 40 dB over the velocity range
    end_s = max(float(off_s.max()) if len(off_s) else 0.0, k * float(score.nominal_duration_s) + HEAD_S)
    n = int(np.ceil((end_s + TAIL_S) * rate_hz)) + 1
    E = np.zeros((n, 12))
    O = np.zeros((n, 12))
    t_frames = np.arange(n) / rate_hz
    rel_frames = int(np.ceil(5 * RELEASE_S * rate_hz))
    for k in range(len(pitch)):
        pcs, a = _partials(pitch[k])
        a = a * amp[k]
        i0 = int(np.ceil(on_s[k] * rate_hz))
        i1 = min(int(np.ceil(off_s[k] * rate_hz)) + rel_frames, n)
        if i1 > i0:
            t = t_frames[i0:i1] - on_s[k]
            env = np.exp(-t / DECAY_S)
            after = t_frames[i0:i1] > off_s[k]
            env[after] *= np.exp(-(t_frames[i0:i1][after] - off_s[k]) / RELEASE_S)
            env2 = env ** 2
            for pc, ah in zip(pcs, a):
                E[i0:i1, pc] += (ah ** 2) * env2
        x = on_s[k] * rate_hz + 0.5
        f0 = int(np.floor(x))
        w1 = x - f0
        strength = np.log1p(1000.0 * a ** 2)
        for pc, s in zip(pcs, strength):
            if 0 <= f0 < n:
                O[f0, pc] += (1 - w1) * s
            if 0 <= f0 + 1 < n:
                O[f0 + 1, pc] += w1 * s
    chroma = finish_chroma(E)
    onset = dlnco(O, rate_hz=rate_hz)
    return AlignFeatures(chroma=chroma, onset=onset, rate_hz=float(rate_hz), start_s=-HEAD_S,
                         energy=E.sum(axis=1), meta={"nominal_s": float(end_s - HEAD_S)})
