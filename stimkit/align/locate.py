"""Find where a piece sounds inside a long recording (a concert, a session), coarsely.

:func:`locate_piece` aligns the score's chroma template to the recording's chroma at about
2 Hz by subsequence DTW (open start and end in the recording, Müller 2015, ch. 7.2) with the
banded kernel of :mod:`stimkit.align.dtw` over the whole matrix (one byte per cell; the rate is
lowered for very long inputs so that the matrix stays under :data:`MAX_CELLS`). It returns the
recording times where ``score_qn = 0`` and the end of the score fall, and the Raffel--Ellis cost
ratio of the match (low is good; a different piece gives about 0.7 or more).

Typical use (one piece of a concert)::

    start, end, cost = locate_piece(score, "concert.flac")
    result = align_score(score, "concert.flac", span_s=(start - 10, end + 10))

To place several pieces, compute the recording features once (:func:`stimkit.align.chroma.audio_features`)
and pass them as ``features``; restrict each search with ``search_span_s`` (e.g. after the end of
the previous piece).

Conventions
-----------
``recording`` seconds from the first sample of the file; ``search_span_s`` also in recording
seconds. The times are as precise as the coarse rate (about ± 0.5 s).

References
----------
.. [1] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 7.2 (subsequence DTW).
.. [2] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .chroma import AlignFeatures, audio_features
from .dtw import StepWeights, _unit, banded_dtw, downsample, full_band, path_costs
from .template import score_features
from .warp import monotone_knots

__all__ = ["locate_piece", "LOCATE_FACTOR", "MAX_CELLS"]

LOCATE_FACTOR = 25            # 49.2 Hz / 25 = 1.97 Hz
MAX_CELLS = 50_000_000        # one byte each


def locate_piece(score, audio_path=None, *, search_span_s: tuple[float, float] | None = None,
                 features: AlignFeatures | None = None, progress=None):
    """Coarse position of ``score`` in a recording: ``(start_s, end_s, cost_ratio)``.

    Parameters
    ----------
    score : ScoreModel
    audio_path : path-like, optional
        The recording (not needed when ``features`` is given).
    search_span_s : (start, end), optional
        Search only there (recording seconds).
    features : AlignFeatures, optional
        Precomputed :func:`~stimkit.align.chroma.audio_features` of the whole recording.

    Raises
    ------
    InputError
        A score without notes, or a search span shorter than 1 s.
    """
    if score.notes is None or len(score.notes) == 0:
        raise InputError("score has no notes; nothing to locate", path=score.path)
    if features is None:
        if audio_path is None:
            raise InputError("give a recording or its features to locate a piece in")
        features = audio_features(audio_path, span_s=search_span_s, progress=progress)
    A = features
    rate = A.rate_hz
    j0, j1 = 0, A.n_frames
    if search_span_s is not None:
        j0 = max(int(np.floor((search_span_s[0] - A.start_s) * rate)), 0)
        j1 = min(int(np.ceil((search_span_s[1] - A.start_s) * rate)) + 1, A.n_frames)
    if (j1 - j0) / rate < 1.0:
        raise InputError("search span is shorter than 1 s; widen it")
    S = score_features(score, rate_hz=rate)
    f = max(LOCATE_FACTOR, int(np.ceil(np.sqrt(S.n_frames * (j1 - j0) / MAX_CELLS))))
    cs = _unit(downsample(S.chroma, f))
    cr = _unit(downsample(A.chroma[j0:j1], f))
    lo, hi = full_band(len(cs), len(cr))
    path, _ = banded_dtw(cs, cr, lo, hi, weights=StepWeights())
    cost = float(path_costs(path, cs, cr).mean() / max(1.0 - float(cs.mean(0) @ cr.mean(0)), 1e-9))
    x, y = monotone_knots(path)
    # coarse cell centres, in nominal seconds (score side) and recording seconds
    nom = S.start_s + (x * f + (f - 1) / 2.0) / rate
    rec = A.start_s + (j0 + y * f + (f - 1) / 2.0) / rate
    if len(nom) < 2:
        nom = np.array([nom[0], nom[0] + f / rate])
        rec = np.array([rec[0], rec[0] + f / rate])
    start = float(np.interp(0.0, nom, rec))
    end = float(np.interp(float(score.nominal_duration_s), nom, rec))
    return start, end, cost
