"""Second pass: realign on a template warped to the first alignment, with the attack of the
instruments and the release of the room fitted to the recording.

After the multiscale DTW (:mod:`stimkit.align.dtw`) every note has a first estimate of its
recording time. :func:`refine` builds the score template again with each note placed at that
time (:func:`stimkit.align.template.score_features` with ``place``), so template frame ``u`` is
meant to meet recording frame ``u`` and the path stays near the diagonal: the step weights no
longer pull notes early or late where the tempo differs from the notated one (rubato, long
ritardandi, a global tempo far from the marks). Of a dry template and two reverberant ones (notes
swell into the room and ring on: :func:`stimkit.align.template.score_features` ``room``) it keeps
the one whose path matches the recording best (lowest mean local cost); then it gives every note the attack of its part's instrument
(:func:`stimkit.align.template.attack_of`: 0 for a piano, about a tenth of a second for bowed
strings and voices) times a factor (0, 1 or 2), a longer attack only where it matches clearly
better, so a slow attack is matched from its start rather than from its middle. (An attack
fitted freely by the cost was tried and dropped: the asynchrony of an ensemble -- a leading
melody, spread chords -- also favours spread onsets and passed for slow attacks, pulling piano
notes early.)

Conventions
-----------
- Template time: the first alignment's ``recording`` seconds minus the recording features'
  ``start_s``; template frame ``u`` and recording frame ``u`` cover the same time.
- The band is ``± BAND_S`` around the diagonal, and passes through the anchors.

References
----------
.. [1] S. Ewert, M. Müller, P. Grosche. "High resolution audio synchronization using chroma
   onset features", ICASSP 2009 (the onset features).
.. [2] M. Müller, H. Mattes, F. Kurth. "An efficient multiscale approach to audio
   synchronization", ISMIR 2006 (refinement in a band around a first path).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..timemap import TimeMap
from .dtw import StepWeights, banded_dtw, constrain_band, path_costs
from .template import HEAD_S, score_features

__all__ = ["Refined", "refine", "ROOMS", "BAND_S"]

#: Rooms tried: (wet share, amplitude decay time constant in s; a room whose RT60 is T decays with
#: about T / 6.9): dry, a room, a hall.
ROOMS = ((0.0, 0.0), (0.5, 0.15), (0.6, 0.35), (0.75, 0.6), (0.85, 1.0))
#: Factors tried on each part's attack (template.attack_of); a longer attack must lower the mean
#: path cost by ATTACK_GAIN at least, and among factors within ATTACK_TIE of the lowest cost the
#: smallest is kept. Set on the development renders of bench/align_material.py (piano with
#: asynchronous chords gains at most 0.1 %, bowed strings and winds 1.5-3 %).
ATTACK_FACTORS = (0.0, 1.0, 2.0)
ATTACK_GAIN = 0.0
ATTACK_TIE = 0.002
#: The gain a longer attack must bring when a part's name says nothing of its instrument (files
#: from optical music recognition, "Part 1"): set between a piano in a 2.2 s hall (a longer attack
#: lowered its cost by 0.5 %: reverberation smears onsets too) and winds, organ and bowed strings
#: (0.9-1.4 %), on seven development renders with the part names removed
#: (:func:`stimkit.render.variants.misread`; k545, h186, polonaise 1 in a hall, bwv66.6 on an organ,
#: bwv10.7 on winds, k458/3 and op. 74/1/2 on strings).
ATTACK_GAIN_UNNAMED = 0.0075
#: Half-width of the band around the first alignment (s).
BAND_S = 0.5


@dataclass
class Refined:
    """The second pass: its template, band, path and the attack/release chosen."""

    S: object                  # AlignFeatures of the warped template
    path: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    place: TimeMap             # score_qn -> template seconds (the warp)
    attack: str                # "parts x F": each part's attack from its name, times F
    room: tuple                # (wet, decay_s) of the room template chosen
    costs: dict                # "room w/d" and "parts x F" -> mean local path cost


def _unnamed(score) -> bool:
    """Whether a part's name says nothing of its instrument."""
    from .template import attack_of

    if "part" not in score.notes:
        return True
    return any(np.isnan(attack_of(p, unnamed=np.nan)) for p in score.notes["part"].astype(str).unique())


def _part_attacks(score) -> np.ndarray:
    """Each note's attack (s) from its part's instrument name (:func:`stimkit.align.template.attack_of`;
    a part whose name says nothing gets :data:`stimkit.align.template.UNNAMED_ATTACK_S`)."""
    from .template import UNNAMED_ATTACK_S, attack_of

    parts = score.notes["part"].astype(str) if "part" in score.notes else None
    if parts is None:
        return np.full(len(score.notes), UNNAMED_ATTACK_S)
    by = {p: attack_of(p, unnamed=UNNAMED_ATTACK_S) for p in parts.unique()}
    return np.array([by[p] for p in parts], dtype=np.float64)


def _band(n_rows: int, n_cols: int, radius: int):
    u = np.arange(n_rows)
    lo = np.clip(u - radius, 0, n_cols - 1)
    hi = np.clip(u + radius, 0, n_cols - 1)
    return lo, hi


def refine(score, A, first: TimeMap, *, anchors=(), onset_weight: float = 1.0,
           weights: StepWeights = StepWeights(), rooms=ROOMS) -> Refined:
    """Realign ``score`` to recording features ``A`` around the first alignment ``first``
    (``score_qn -> recording``); ``anchors`` are ``(score_qn, recording s)`` pairs."""
    rate = A.rate_hz
    place = TimeMap(first.x, first.y - A.start_s - HEAD_S, src="score_qn", dst="nominal")
    radius = max(int(round(BAND_S * rate)), 2)
    costs: dict = {}
    found: dict = {}

    def run(att, rel):
        key = (att, tuple(rel))
        if key in found:
            return found[key]
        S = score_features(score, rate_hz=rate, place=place,
                           attack_s=np.asarray(att) if isinstance(att, tuple) else att, room=rel)
        lo, hi = _band(S.n_frames, A.n_frames, radius)
        if anchors:
            cells = [(int(round((float(place(q)) + HEAD_S) * rate)), int(round((s - A.start_s) * rate)))
                     for q, s in anchors]
            cells = [(min(max(i, 0), S.n_frames - 1), min(max(j, 0), A.n_frames - 1)) for i, j in cells]
            lo, hi = constrain_band(lo, hi, cells, n_cols=A.n_frames)
        try:
            path, _ = banded_dtw(S.chroma, A.chroma, lo, hi, onset_s=S.onset, onset_r=A.onset,
                                 onset_weight=onset_weight, weights=weights)
        except ValueError:
            found[key] = None
            return None
        c = float(path_costs(path, S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset,
                             onset_weight=onset_weight).mean())
        costs[key] = c
        found[key] = (c, S, path, lo, hi, att, tuple(rel))
        return found[key]

    # the release that matches best with instant attacks; then each part's attack from its
    # instrument (template.attack_of) times a factor: a longer attack is kept only if it lowers
    # the mean path cost clearly (ATTACK_GAIN), and of factors within ATTACK_TIE of the best the
    # smallest -- part names can mislead (a chorale's voices played on an organ), and an
    # ensemble's asynchrony (a leading melody, spread chords) also favours spread onsets a little
    rels = [r for r in rooms if run(0.0, r) is not None]
    if not rels:
        raise ValueError("no warping path fits the band of the second pass")
    rel = min(rels, key=lambda r: found[(0.0, tuple(r))][0])
    base = found[(0.0, tuple(rel))][0]
    prior = _part_attacks(score)
    tried = [(m, run(0.0 if m == 0 else tuple(prior * m), rel)) for m in ATTACK_FACTORS]
    tried = [(m, r) for m, r in tried if r is not None]
    c_best = min(r[0] for _, r in tried)
    m_pick = 0.0
    if c_best < base * (1.0 - (ATTACK_GAIN_UNNAMED if _unnamed(score) else ATTACK_GAIN)):
        m_pick = min(m for m, r in tried if r[0] <= c_best * (1.0 + ATTACK_TIE))
    best = next(r for m, r in tried if m == m_pick)
    if best is None:
        raise ValueError("no warping path fits the band of the second pass")
    _, S, path, lo, hi, att, rel = best
    return Refined(S=S, path=path, lo=lo, hi=hi, place=place, attack=f"parts x {m_pick:g}",
                   room=tuple(float(v) for v in rel),
                   costs={**{f"room {r[0]:g}/{r[1]:g}": float(found[(0.0, tuple(r))][0]) for r in rels},
                          **{f"parts x {m:g}": float(r[0]) for m, r in tried}})
