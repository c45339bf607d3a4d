"""Find where a piece sounds inside a long recording (a concert, a session), coarsely.

:func:`locate_piece` runs the structure fit of :mod:`stimkit.align.structure` over the recording
(or a search span of it): jump-aware subsequence DTW of the score's chroma template against the
recording's chroma at a few frames per second, over a grid of global tempo scales, with open start
and end in the recording (Müller 2015, ch. 7.2; Fremerey, Müller & Clausen 2010). So a piece is
found also when it is played far from its notated tempo or with repeats left out. It returns the
recording times of the first and last note of the match and its Raffel--Ellis cost ratio (low is
good; a different piece gives about 0.7 or more).

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
.. [3] C. Fremerey, M. Müller, M. Clausen. "Handling repeats and jumps in score-performance
   synchronization", ISMIR 2010.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .chroma import AlignFeatures, audio_features
from .structure import fit_structure

__all__ = ["locate_piece"]


def locate_piece(score, audio_path=None, *, search_span_s: tuple[float, float] | None = None,
                 features: AlignFeatures | None = None, repeats="auto", progress=None):
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
    repeats : str
        ``"auto"`` lets the match leave repeats out; anything else matches ``score`` as it is.

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
    st = fit_structure(score, A, j0=j0, j1=j1, decide_repeats=repeats == "auto")
    return float(st.start_s), float(st.end_s), float(st.cost_ratio)
