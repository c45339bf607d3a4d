"""Jump-aware DTW: align a recording to a score whose rows may skip forward over optional spans.

The score side is the *longest* performed order (every repeat taken, see
:class:`stimkit.score.repeats.RepeatPlan`); a performer who leaves a repeat out skips a span of its
rows. :func:`jump_dtw` is subsequence DTW (open start and end in the recording) over the full
matrix whose recursion, at the first row after a span, may also come from the last row before the
span -- the segment graph of Fremerey, Müller & Clausen (2010), restricted to forward jumps, so a
path is a performance in which every option is either played or left out once. Ends may also fall
on rows from which the rest of the score may be left out (a D.C. not taken).

Conventions
-----------
- Rows ``i`` (score frames), columns ``j`` (recording frames); the local cost and the step
  weights are those of :mod:`stimkit.align.dtw` (diagonal, score-only, recording-only).
- ``jumps``: pairs ``(src, dst)`` of rows with ``src < dst - 1``: a path may go from row ``src``
  to row ``dst`` as if they were neighbours. ``ends``: rows where a path may end besides the last.
- Open start and end: recording frames before the path's first cell and after its last cost
  ``skip_cost`` each (a background level; with 0 they are free, and a path would rather leave a
  repeated opening or closing section of the recording out than match it).
- Memory: one byte per cell plus one float row per jump source; time is linear in the cells.

References
----------
.. [1] C. Fremerey, M. Müller, M. Clausen. "Handling repeats and jumps in score-performance
   synchronization", ISMIR 2010.
.. [2] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 3.2 and 7.2.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .dtw import StepWeights

__all__ = ["jump_dtw"]


@njit(cache=True, fastmath=True)
def _jump_dtw(cs, cr, w_d, w_s, w_r, jptr, jsrc, slot, n_slots, can_end, jump_cost, skip_cost):
    n, m = cs.shape[0], cr.shape[0]
    inf = np.inf
    steps = np.full((n, m), 255, dtype=np.uint8)
    saved = np.full((max(n_slots, 1), m), inf)
    prev = np.full(m, inf)
    cur = np.full(m, inf)
    rowc = np.empty(m)
    best_end = inf
    end_i = -1
    end_j = -1
    d = cs.shape[1]
    for i in range(n):
        for j in range(m):
            s = 0.0
            for q in range(d):
                s += cs[i, q] * cr[j, q]
            rowc[j] = 1.0 - s
        if i == 0:
            for j in range(m):
                cur[j] = rowc[j] + skip_cost * j   # open start: any column, skipped frames paid
                steps[0, j] = 3
        else:
            left = inf
            for j in range(m):
                c = rowc[j]
                best = left + w_r * c
                code = 2
                if j > 0:
                    v = prev[j - 1] + w_d * c
                    if v <= best:
                        best = v
                        code = 0
                v = prev[j] + w_s * c
                if v < best:
                    best = v
                    code = 1
                for k in range(jptr[i], jptr[i + 1]):
                    sl = slot[jsrc[k]]
                    if j > 0:
                        v = saved[sl, j - 1] + w_d * c + jump_cost
                        if v < best:
                            best = v
                            code = 4 + 2 * (k - jptr[i])
                    v = saved[sl, j] + w_s * c + jump_cost
                    if v < best:
                        best = v
                        code = 5 + 2 * (k - jptr[i])
                if best == inf:
                    code = 255
                cur[j] = best
                left = best
                steps[i, j] = code
        if slot[i] >= 0:
            for j in range(m):
                saved[slot[i], j] = cur[j]
        if can_end[i]:
            for j in range(m):
                v = cur[j] + skip_cost * (m - 1 - j)
                if v < best_end:
                    best_end = v
                    end_i = i
                    end_j = j
        prev, cur = cur, prev
    return steps, end_i, end_j, best_end


@njit(cache=True)
def _backtrack(steps, jptr, jsrc, end_i, end_j):
    n, m = steps.shape
    cap = n + m + 2
    pi = np.empty(cap, dtype=np.int64)
    pj = np.empty(cap, dtype=np.int64)
    i, j, k = end_i, end_j, 0
    while True:
        pi[k] = i
        pj[k] = j
        k += 1
        code = steps[i, j]
        if code == 3:
            break
        if code == 0:
            i -= 1
            j -= 1
        elif code == 1:
            i -= 1
        elif code == 2:
            j -= 1
        elif code >= 4 and code != 255:
            e = (code - 4) // 2
            src = jsrc[jptr[i] + e]
            if (code - 4) % 2 == 0:
                j -= 1
            i = src
        else:
            return pi[:0], pj[:0]
        if i < 0 or j < 0 or k >= cap:
            return pi[:0], pj[:0]
    return pi[:k][::-1].copy(), pj[:k][::-1].copy()


def jump_dtw(chroma_s, chroma_r, *, jumps=(), ends=(), weights: StepWeights = StepWeights(),
             jump_cost: float = 0.0, skip_cost: float = 0.0):
    """Subsequence DTW with forward jumps over the full matrix.

    Parameters
    ----------
    chroma_s, chroma_r : ndarray (N, d), (M, d)
        Unit feature vectors of the score (longest order) and the recording.
    jumps : sequence of (src, dst)
        Rows ``dst`` may be entered from row ``src`` (``src < dst``), as from row ``dst - 1``.
    ends : sequence of int
        Rows where the path may end besides the last row.
    jump_cost : float
        Added to the accumulated cost when a jump is taken.
    skip_cost : float
        Cost of each recording frame left out before the start or after the end of the path (a
        background model: frames that match the score worse than this are better left out;
        0 is plain subsequence DTW).

    Returns
    -------
    path : ndarray (L, 2)
        Cells from row 0 to an end row, non-decreasing in the recording; rows increase by one
        or jump.
    cost : float
        Accumulated weighted cost at the end cell.
    """
    cs = np.ascontiguousarray(chroma_s, dtype=np.float64)
    cr = np.ascontiguousarray(chroma_r, dtype=np.float64)
    n = cs.shape[0]
    if n == 0 or cr.shape[0] == 0:
        raise ValueError("empty sequence")
    pairs = sorted({(int(a), int(b)) for a, b in jumps if 0 <= int(a) < int(b) - 1 and int(b) < n})
    by_dst: dict[int, list[int]] = {}
    for a, b in pairs:
        by_dst.setdefault(b, []).append(a)
    if any(len(v) > 125 for v in by_dst.values()):
        raise ValueError("more than 125 jumps into one row")
    jptr = np.zeros(n + 1, dtype=np.int64)
    for b, srcs in by_dst.items():
        jptr[b + 1] = len(srcs)
    jptr = np.cumsum(jptr)
    jsrc = np.zeros(max(int(jptr[-1]), 1), dtype=np.int64)
    for b, srcs in by_dst.items():
        jsrc[jptr[b]:jptr[b] + len(srcs)] = srcs
    sources = sorted({a for a, _ in pairs})
    slot = np.full(n, -1, dtype=np.int64)
    for k, a in enumerate(sources):
        slot[a] = k
    can_end = np.zeros(n, dtype=np.bool_)
    can_end[n - 1] = True
    for e in ends:
        if 0 <= int(e) < n:
            can_end[int(e)] = True
    steps, ei, ej, cost = _jump_dtw(cs, cr, weights.diag, weights.score, weights.rec, jptr, jsrc, slot,
                                    len(sources), can_end, float(jump_cost), float(skip_cost))
    if ei < 0 or not np.isfinite(cost):
        raise ValueError("no warping path")
    pi, pj = _backtrack(steps, jptr, jsrc, ei, ej)
    if pi.size == 0 or pi[0] != 0:
        raise ValueError("no warping path")
    return np.stack([pi, pj], axis=1), float(cost)
