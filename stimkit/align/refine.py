"""Second pass: realign on a template warped to the first alignment, with the attack of the
instruments and the release of the room fitted to the recording.

After the multiscale DTW (:mod:`stimkit.align.dtw`) every note has a first estimate of its
recording time. :func:`refine` builds the score template again with each note placed at that
time (:func:`stimkit.align.template.score_features` with ``place``), so template frame ``u`` is
meant to meet recording frame ``u`` and the path stays near the diagonal: the step weights no
longer pull notes early or late where the tempo differs from the notated one (rubato, long
ritardandi, a global tempo far from the marks). On that template it tries a few attack times
(a linear amplitude ramp at each note start: 0 for a piano, 0.05-0.3 s for bowed strings,
voices, winds) and release times (the decay after a note's end, longer in a reverberant hall),
keeps the pair whose path matches the recording best (lowest mean local cost), and returns that
path. A template with the recording's own attack puts each note at its start, not at the middle
of a slow attack where a template with instant attacks would put it.

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
from .template import HEAD_S, RELEASE_S, score_features

__all__ = ["Refined", "refine", "ATTACKS_S", "RELEASES_S", "BAND_S"]

#: Attack times tried (s) and release time constants tried (s, amplitude).
ATTACKS_S = (0.0, 0.04, 0.08, 0.15, 0.25)
RELEASES_S = (RELEASE_S, 0.25, 0.5)
import os as _os
if _os.environ.get("STIMKIT_DEV_ATTACKS"):
    ATTACKS_S = tuple(float(x) for x in _os.environ["STIMKIT_DEV_ATTACKS"].split(","))
if _os.environ.get("STIMKIT_DEV_RELEASES"):
    RELEASES_S = tuple(float(x) for x in _os.environ["STIMKIT_DEV_RELEASES"].split(","))
#: A slower attack is taken only if it lowers the mean path cost by this fraction at least; among
#: attacks within ATTACK_TIE of the lowest cost the shortest is kept. Set on the development
#: renders of bench/align_material.py (piano with asynchronous chords gains at most 0.1 %,
#: bowed strings and winds 1.5-3 %).
ATTACK_GAIN = 0.015
ATTACK_TIE = 0.005
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
    attack_s: float
    release_s: float
    costs: dict                # (attack, release) -> mean local path cost


def _band(n_rows: int, n_cols: int, radius: int):
    u = np.arange(n_rows)
    lo = np.clip(u - radius, 0, n_cols - 1)
    hi = np.clip(u + radius, 0, n_cols - 1)
    return lo, hi


def refine(score, A, first: TimeMap, *, anchors=(), onset_weight: float = 1.0,
           weights: StepWeights = StepWeights(), attacks=ATTACKS_S, releases=RELEASES_S) -> Refined:
    """Realign ``score`` to recording features ``A`` around the first alignment ``first``
    (``score_qn -> recording``); ``anchors`` are ``(score_qn, recording s)`` pairs."""
    rate = A.rate_hz
    place = TimeMap(first.x, first.y - A.start_s - HEAD_S, src="score_qn", dst="nominal")
    radius = max(int(round(BAND_S * rate)), 2)
    costs: dict = {}
    found: dict = {}

    def run(att, rel):
        key = (float(att), float(rel))
        if key in found:
            return found[key]
        S = score_features(score, rate_hz=rate, place=place, attack_s=att, release_s=rel)
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
        found[key] = (c, S, path, lo, hi, float(att), float(rel))
        return found[key]

    # the release first (instant attacks), then the attack: a slower attack must lower the cost
    # clearly (ATTACK_GAIN), and of attacks within ATTACK_TIE of the best the shortest is kept --
    # an ensemble's asynchrony (a leading melody, spread chords) also favours spread onsets a
    # little, and must not pass for slow attacks
    rels = [r for r in releases if run(attacks[0], r) is not None]
    if not rels:
        raise ValueError("no warping path fits the band of the second pass")
    rel = min(rels, key=lambda r: found[(float(attacks[0]), float(r))][0])
    base = found[(float(attacks[0]), float(rel))][0]
    tried = [(a, run(a, rel)) for a in attacks]
    tried = [(a, r[0]) for a, r in tried if r is not None]
    c_best = min(c for _, c in tried)
    att = attacks[0]
    if c_best < base * (1.0 - ATTACK_GAIN):
        att = min(a for a, c in tried if c <= c_best * (1.0 + ATTACK_TIE))
    best = found[(float(att), float(rel))]
    if best is None:
        raise ValueError("no warping path fits the band of the second pass")
    _, S, path, lo, hi, att, rel = best
    return Refined(S=S, path=path, lo=lo, hi=hi, place=place, attack_s=float(att), release_s=float(rel),
                   costs=costs)
