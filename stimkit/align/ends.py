"""The end of a piece again, when the first alignment squeezed its last bars.

The first alignment is a subsequence DTW with an open end (Müller 2015, ch. 7.2): the path may
leave the recording anywhere, so that applause or speech after a piece is not matched. The same
freedom lets it *squeeze* the last bars -- match several seconds of score to a fraction of a
second of recording -- when the performers slow down far more than the score says (a long final
ritardando, a fermata and its rest held for many seconds): the accumulated cost favours short
paths. :func:`refit_tail` looks for that shape and, where it finds it, aligns the last
:data:`TAIL_S` seconds of the score again against the recording up to :data:`SLOWEST` times
their nominal length, with the end fixed at each candidate column in turn, and keeps the end
whose path has the lowest *mean* local cost (a length-normalised choice, as the Raffel & Ellis
2016 ratio normalises a path's cost) -- if that mean is clearly lower than the squeezed path's.
Applause after a piece matches the score's final chord worse than the chord itself does, so the
normalised choice does not run into it.

References
----------
.. [1] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 7.2 (subsequence DTW).
.. [2] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016 (mean path cost as a measure of a match).
"""

from __future__ import annotations

import numpy as np

from .dtw import StepWeights, banded_dtw, path_costs

__all__ = ["refit_tail", "TAIL_S", "SQUEEZED_BELOW", "SLOWEST", "GAIN"]

#: Seconds of (scaled nominal) score at the end that are checked and re-fitted.
TAIL_S = 5.0
#: The tail counts as squeezed when its recording span is under this share of its score span.
SQUEEZED_BELOW = 0.5
#: The re-fit lets the tail last up to this many times its nominal length.
SLOWEST = 4.0
#: A re-fitted tail is kept when its mean local cost is below this share of the squeezed one's:
#: the squeeze itself is the evidence (seconds of music in a fraction of the time), the mean cost
#: only keeps the re-fit from making the match worse (no value was tuned here).
GAIN = 1.0


def refit_tail(path, S, A, *, music_end_row: int, onset_weight: float, weights: StepWeights = StepWeights(),
               fixed_rows=()):
    """A new fine path when the last :data:`TAIL_S` s of the score were squeezed, else ``None``.

    ``path`` is the first alignment's fine path (rows: template frames of ``S``, columns:
    recording frames of ``A``), ``music_end_row`` the template row where the last note ends (the
    silent tail after it is re-fitted too); ``fixed_rows`` are rows an anchor holds (no re-fit
    when one lies in the tail).
    """
    p = np.asarray(path, dtype=np.int64)
    rate = float(A.rate_hz)
    n_rows, n_cols = S.n_frames, A.n_frames
    ra = max(int(music_end_row - TAIL_S * rate), 0)
    if ra <= 0 or music_end_row <= ra or any(r >= ra for r in fixed_rows):
        return None
    rows, cols = p[:, 0], p[:, 1]
    ca = int(cols[np.searchsorted(rows, ra)])
    ce = int(cols[min(np.searchsorted(rows, music_end_row), len(rows) - 1)])
    if ce - ca >= SQUEEZED_BELOW * (music_end_row - ra):
        return None
    cs, os_ = S.chroma[ra:], S.onset[ra:]
    old = p[rows >= ra]
    old_mean = float(path_costs(old, S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset,
                                onset_weight=onset_weight).mean())
    c_hi = min(n_cols - 1, ca + int(SLOWEST * (n_rows - ra)))
    first = int(old[-1, 1])
    step = max(int(round(rate / 4)), 1)
    best = None
    for e in range(first, c_hi + 1, step):
        width = e - ca + 1
        if width < 2:
            continue
        cr, or_ = A.chroma[ca:e + 1], A.onset[ca:e + 1]
        lo = np.zeros(len(cs), dtype=np.int64)
        hi = np.full(len(cs), width - 1, dtype=np.int64)
        try:
            sub, _ = banded_dtw(cs, cr, lo, hi, onset_s=os_, onset_r=or_, onset_weight=onset_weight,
                                weights=weights, open_start=False, open_end=False)
        except ValueError:
            continue
        m = float(path_costs(sub, cs, cr, onset_s=os_, onset_r=or_, onset_weight=onset_weight).mean())
        if best is None or m < best[0]:
            best = (m, sub)
    if best is None or best[0] >= GAIN * old_mean:
        return None
    tail = best[1] + np.array([ra, ca], dtype=np.int64)
    head = p[rows < ra]
    return np.concatenate([head, tail], axis=0)
