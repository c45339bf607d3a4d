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
from numba import njit

from .chroma import RATE_HZ, AlignFeatures, dlnco, finish_chroma

__all__ = ["score_features", "attack_kernel", "attack_of", "ATTACK_BY_NAME", "UNNAMED_ATTACK_S", "N_PARTIALS", "PARTIAL_DECAY", "DECAY_S", "RELEASE_S", "HEAD_S", "TAIL_S"]

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


#: Log compression of a note's own energy rise used to shape the onset of a slow attack (the audio
#: side compresses with ``log(1 + 1000 P / max P)``; a single note sits some 10 dB under the
#: loudest frame).
ATTACK_LOG_GAIN = 100.0



def attack_kernel(attack_s: float, rate_hz: float, *, step: float = 0.125):
    """Where the onset strength of a note with a linear amplitude ramp of ``attack_s`` lies:
    sample offsets (frames after the note start) and weights summing to 1. The weights follow the
    rise of ``log(1 + G (t / attack)^2)`` (the audio side's log-compressed energy), so most of the
    strength comes early in the ramp; ``attack_s = 0`` is a single impulse at the start."""
    tf = float(attack_s) * rate_hz
    if tf < step:
        return np.zeros(1), np.ones(1)
    edges = np.arange(0.0, tf + step, step)
    edges[-1] = tf
    level = np.log1p(ATTACK_LOG_GAIN * (edges / tf) ** 2)
    w = np.diff(level)
    mid = 0.5 * (edges[1:] + edges[:-1])
    keep = w > 0
    return mid[keep], w[keep] / w[keep].sum()


@njit(cache=True)
def _accumulate(on_f, off_f, pcs, amps, n, decay_f, release_f, attack_f, kind, k_off, k_w, k_len, E, O):
    """Energy ``E`` and onset impulses ``O`` (frames x 12) of all notes; times in frames. Note
    ``k`` has an attack of ``attack_f[k]`` frames and onset kernel ``kind[k]`` (offsets
    ``k_off[kind, :k_len[kind]]``, weights ``k_w``)."""
    for k in range(on_f.shape[0]):
        i0 = int(np.ceil(on_f[k]))
        i1 = min(int(np.ceil(off_f[k] + 5.0 * release_f)) + 1, n)
        for i in range(max(i0, 0), i1):
            t = i - on_f[k]
            env = np.exp(-t / decay_f)
            if attack_f[k] > 0.0 and t < attack_f[k]:
                env *= t / attack_f[k]
            if i > off_f[k]:
                env *= np.exp(-(i - off_f[k]) / release_f)
            e2 = env * env
            for h in range(pcs.shape[1]):
                E[i, pcs[k, h]] += amps[k, h] * amps[k, h] * e2
        x0 = on_f[k] + 0.5
        c = kind[k]
        for h in range(pcs.shape[1]):
            s0 = np.log1p(1000.0 * amps[k, h] * amps[k, h])
            for q in range(k_len[c]):
                x = x0 + k_off[c, q]
                f0 = int(np.floor(x))
                w1 = x - f0
                s = s0 * k_w[c, q]
                if 0 <= f0 < n:
                    O[f0, pcs[k, h]] += (1.0 - w1) * s
                if 0 <= f0 + 1 < n:
                    O[f0 + 1, pcs[k, h]] += w1 * s


#: Attack times (s) by instrument family, from the part's name: the linear amplitude ramp the
#: template gives each note (orders of magnitude of the trade: struck and plucked strings speak at
#: once, winds within a few tens of ms, voices and bowed strings take up to a few tenths of a
#: second; Meyer, *Acoustics and the Performance of Music*, 2009, ch. 3 -- values rounded, as
#: common practice). First match wins; "bass" alone is a voice (choral parts), "double bass" or
#: "contrabass" a string.
ATTACK_BY_NAME = (
    (r"piano|harpsichord|cembalo|clavi|guitar|lute|harp|celesta|marimba|xylophone|vibraphone|glock|"
     r"timpani|drum|pizz", 0.0),
    (r"double bass|contrabass|kontrabass|violin|violino|viola|cello|violoncello|string|fiddle", 0.10),
    (r"voice|vocal|voce|soprano|mezzo|alto|contralto|tenor|baritone|bass|choir|chorus|chor|canto|sing", 0.08),
    (r"flute|flauto|piccolo|oboe|english horn|cor anglais|clarinet|bassoon|fagott|saxophone|horn|corno|"
     r"trumpet|tromba|cornet|trombone|tuba|recorder|winds?", 0.05),
    (r"organ|orgel|harmonium|accordion", 0.03),
)


#: Attack tried for a part whose name says nothing of its instrument ("Part 1", "P2", "Staff"):
#: that of bowed strings; the second pass multiplies it by 0, 1 or 2 and keeps a longer attack
#: only where it matches clearly better (:mod:`stimkit.align.refine`), so an unnamed piano keeps
#: its instant attack.
UNNAMED_ATTACK_S = 0.10


def attack_of(part_name: str, *, unnamed: float = 0.0) -> float:
    """Attack time (s) the template gives the notes of a part called ``part_name``
    (:data:`ATTACK_BY_NAME`; ``unnamed`` -- 0, an instant attack, by default -- when the name
    says nothing)."""
    import re

    name = str(part_name).lower()
    for pattern, attack in ATTACK_BY_NAME:
        if re.search(pattern, name):
            return attack
    return unnamed


def score_features(score, *, rate_hz: float = RATE_HZ, time_scale: float = 1.0, place=None,
                   attack_s=0.0, release_s: float = RELEASE_S, room=None) -> AlignFeatures:
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
    place : callable, optional
        ``place(score_qn) -> seconds``: where to put each note on the template's time axis
        instead of the scaled tempo map (a *warped* template, e.g. at the times a first
        alignment predicts); frame ``k`` is then at ``k / rate_hz - HEAD_S`` of that axis too.
    attack_s : float, "parts" or array
        Linear amplitude ramp at each note start (0: an instant attack, as a piano's); bowed
        strings, voices and winds take 0.05-0.3 s. Shapes the energy and spreads the onset
        strength over the ramp (:func:`attack_kernel`). ``"parts"``: each part's from its name
        (:func:`attack_of`); an array: one value per note of ``score.notes``.
    release_s : float
        Amplitude time constant of the decay after a note's end (a room's reverberation lengthens
        it: an energy decay of 60 dB in RT60 seconds is an amplitude time constant of
        RT60 / 6.9).
    room : (wet, decay_s), optional
        A reverberant room: the energy of every pitch class becomes ``(1 - wet)`` of the dry
        energy plus ``wet`` of the dry energy smoothed by an exponential decay of amplitude time
        constant ``decay_s`` (an energy decay of RT60 / 13.8; Sabine's exponential decay, as
        in Kuttruff, *Room Acoustics*, ch. 5). Notes then swell into the room and ring on after
        their end, as they do in a hall.
"""
    notes = score.notes
    tm = score.tempo_map
    q_on = notes["score_qn"].to_numpy(np.float64)
    q_off = (notes["score_qn"] + notes["duration_qn"]).to_numpy(np.float64)
    if place is None:
        k = float(time_scale)
        on_s = k * np.asarray(tm(q_on), dtype=np.float64) + HEAD_S
        off_s = k * np.asarray(tm(q_off), dtype=np.float64) + HEAD_S
        end_s = k * float(score.nominal_duration_s) + HEAD_S
    else:
        on_s = np.asarray(place(q_on), dtype=np.float64) + HEAD_S
        off_s = np.asarray(place(q_off), dtype=np.float64) + HEAD_S
        end_s = float(place(float(score.total_qn))) + HEAD_S
    off_s = np.maximum(off_s, on_s + 0.03)
    pitch = notes["pitch"].to_numpy().astype(int)
    vel = notes["velocity"].to_numpy(np.float64) if "velocity" in notes else np.full(len(notes), 80.0)
    vel = np.where(np.isfinite(vel), vel, 80.0)
    amp = 10 ** ((np.clip(vel, 1, 127) - 127) / 126 * 40 / 20)   # 40 dB over the velocity range
    end_s = max(float(off_s.max()) if len(off_s) else 0.0, end_s)
    n = int(np.ceil((end_s + TAIL_S) * rate_hz)) + 1
    E = np.zeros((n, 12))
    O = np.zeros((n, 12))
    h = np.arange(1, N_PARTIALS + 1)
    pcs = ((pitch[:, None] + np.round(12 * np.log2(h)).astype(int)[None, :]) % 12).astype(np.int64)
    amps = (PARTIAL_DECAY ** (h - 1))[None, :] * amp[:, None]
    if isinstance(attack_s, str):
        by_part = {p: attack_of(p) for p in notes["part"].astype(str).unique()} if "part" in notes else {}
        att = np.array([by_part.get(p, 0.0) for p in notes["part"].astype(str)]) if by_part else \
            np.zeros(len(notes))
    else:
        att = np.broadcast_to(np.asarray(attack_s, dtype=np.float64), (len(notes),)).copy()
    kinds, kind = np.unique(np.round(att, 4), return_inverse=True)
    kernels = [attack_kernel(a, rate_hz) for a in kinds]
    width = max(len(k[0]) for k in kernels)
    k_off = np.zeros((len(kinds), width))
    k_w = np.zeros((len(kinds), width))
    k_len = np.zeros(len(kinds), dtype=np.int64)
    for c, (o, w) in enumerate(kernels):
        k_off[c, :len(o)], k_w[c, :len(w)], k_len[c] = o, w, len(o)
    _accumulate(on_s * rate_hz, off_s * rate_hz, pcs, amps, n, DECAY_S * rate_hz,
                max(float(release_s), 1e-3) * rate_hz, att * rate_hz, kind.astype(np.int64), k_off, k_w,
                k_len, E, O)
    if room is not None and room[0] > 0:
        from scipy.signal import lfilter

        wet, decay = float(room[0]), max(float(room[1]), 1e-3)
        a = np.exp(-2.0 / (decay * rate_hz))     # energy decays twice as fast as amplitude
        E = (1.0 - wet) * E + wet * lfilter([1.0 - a], [1.0, -a], E, axis=0)
    chroma = finish_chroma(E)
    onset = dlnco(O, rate_hz=rate_hz)
    return AlignFeatures(chroma=chroma, onset=onset, rate_hz=float(rate_hz), start_s=-HEAD_S,
                         energy=E.sum(axis=1), meta={"nominal_s": float(end_s - HEAD_S)})
