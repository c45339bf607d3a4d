"""Banded and multiscale dynamic time warping with memory bounded independently of length.

Computes a warping path between a score feature sequence (rows ``i``, the score side in nominal
time) and a recording feature sequence (columns ``j``, recording time), both at the same frame
rate. Only the cells of a band -- one interval ``[lo[i], hi[i]]`` of columns per row -- are
visited; the accumulated cost is kept for two rows only and the step taken is stored in one
byte per band cell, so memory is ``N`` bytes times the band width.

Conventions
-----------
- Features are frame-wise, frame ``k`` centred at ``k / rate_hz`` seconds of its own time axis.
  ``chroma`` rows are L2-normalised vectors (12 pitch classes and a silence component); ``onset`` rows are chroma-onset vectors (may be
  empty, shape ``(n, 0)``).
- Local cost ``c(i, j) = 1 - <chroma_s[i], chroma_r[j]> + onset_weight * ||onset_s[i] - onset_r[j]||``
  (cosine distance plus the Euclidean distance of the chroma-onset features, as in Ewert,
  Müller & Grosche 2009).
- Steps and weights (:class:`StepWeights`): diagonal ``(1, 1)`` weight 1, score-only step
  ``(1, 0)`` weight 1.5, recording-only step ``(0, 1)`` weight 0.75. Reasons, each measured on
  rendered tests: (a) with an open start and end a score-only step must cost *more* per score
  frame than a diagonal one, or the path gains by squeezing the score into a few recording
  frames (with the common closed-end weights 2 / 1.5 / 1.5 the first bars slid past); (b) a
  recording-only step must be cheap, or a 20 s insertion (speech, applause, a long pause) costs
  more than skipping the first bars of music through the open start -- with 1 / 1.25 / 1.25 the
  path started 25-55 s late when 20 s of applause was inserted; (c) a detour (0.75 + 1.5) stays
  dearer than a diagonal step. A long run of one-axis steps marks a cut or an insertion.
- Open start/end (subsequence DTW, Müller 2015, ch. 7.2): the path may start in any column of
  row 0 and end in any column of the last row, so silence, applause or speech before and after the
  piece do not bend it.

The multiscale driver follows Müller, Mattes & Kurth (2006) and the memory-restricted variant of
Prätzlich, Driedger & Müller (2016): align at about 1 Hz over the full (anchor-constrained)
matrix, project the path to the next rate, widen it by a radius, and refine inside the band.

References
----------
.. [1] M. Müller, H. Mattes, F. Kurth. "An efficient multiscale approach to audio
   synchronization", ISMIR 2006.
.. [2] T. Prätzlich, J. Driedger, M. Müller. "Memory-restricted multiscale dynamic time
   warping", ICASSP 2016.
.. [3] S. Ewert, M. Müller, P. Grosche. "High resolution audio synchronization using chroma
   onset features", ICASSP 2009.
.. [4] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 3 and 7.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

__all__ = [
    "StepWeights",
    "banded_dtw",
    "full_band",
    "band_from_path",
    "constrain_band",
    "downsample",
    "path_costs",
    "multiscale_dtw",
    "key_shift_costs",
    "band_margins",
]


@dataclass(frozen=True)
class StepWeights:
    """Step weights of the DTW recursion (diagonal, score-only, recording-only)."""

    diag: float = 1.0
    score: float = 1.5
    rec: float = 0.75


@njit(cache=True, fastmath=True, inline="always")
def _cell_cost(cs, cr, os_, or_, w_on, i, j):
    d = 0.0
    for k in range(cs.shape[1]):
        d += cs[i, k] * cr[j, k]
    c = 1.0 - d
    if w_on > 0.0 and os_.shape[1] > 0:
        e = 0.0
        for k in range(os_.shape[1]):
            t = os_[i, k] - or_[j, k]
            e += t * t
        c += w_on * np.sqrt(e)
    return c


@njit(cache=True, fastmath=True)
def _dtw_band(cs, cr, os_, or_, w_on, lo, hi, offs, w_d, w_s, w_r, open_start, open_end, acc):
    """Accumulate over the band; return (steps uint8 per band cell, end column, total cost).

    ``acc``: float32 array of one value per band cell to receive the accumulated costs, or an
    empty array (not stored)."""
    keep = acc.shape[0] > 0
    n = lo.shape[0]
    total = offs[n]
    steps = np.full(total, 255, dtype=np.uint8)  # 0 diag, 1 score step, 2 rec step, 3 start
    width = 0
    for i in range(n):
        if hi[i] - lo[i] + 1 > width:
            width = hi[i] - lo[i] + 1
    inf = np.inf
    prev = np.full(width, inf)
    cur = np.full(width, inf)
    # row 0
    for j in range(lo[0], hi[0] + 1):
        c = _cell_cost(cs, cr, os_, or_, w_on, 0, j)
        k = j - lo[0]
        if open_start or j == 0:
            best = c
            code = 3
        else:
            best = inf
            code = 255
            if k > 0 and cur[k - 1] < inf:
                best = cur[k - 1] + w_r * c
                code = 2
        cur[k] = best
        steps[offs[0] + k] = code
        if keep:
            acc[offs[0] + k] = best
    rowc = np.empty(width)
    d_on = os_.shape[1] if w_on > 0.0 else 0
    for i in range(1, n):
        prev, cur = cur, prev
        plo, phi = lo[i - 1], hi[i - 1]
        li = lo[i]
        m = hi[i] - li + 1
        for k in range(m):          # local costs of the row (tight loop, vectorised by LLVM)
            j = li + k
            d = 0.0
            for q in range(cs.shape[1]):
                d += cs[i, q] * cr[j, q]
            c = 1.0 - d
            if d_on > 0:
                e = 0.0
                for q in range(d_on):
                    t = os_[i, q] - or_[j, q]
                    e += t * t
                c += w_on * np.sqrt(e)
            rowc[k] = c
        base = offs[i]
        left = inf
        for k in range(m):
            j = li + k
            c = rowc[k]
            best = left + w_r * c
            code = 2
            jd = j - 1 - plo
            if jd >= 0 and j - 1 <= phi:
                v = prev[jd] + w_d * c
                if v <= best:
                    best = v
                    code = 0
            jv = j - plo
            if jv >= 0 and j <= phi:
                v = prev[jv] + w_s * c
                if v < best:
                    best = v
                    code = 1
            if best == inf:
                code = 255
            cur[k] = best
            left = best
            steps[base + k] = code
            if keep:
                acc[base + k] = best
        for k in range(m, width):
            cur[k] = inf
    last = n - 1
    end = -1
    best = inf
    if open_end:
        for j in range(lo[last], hi[last] + 1):
            v = cur[j - lo[last]]
            if v < best:
                best = v
                end = j
    else:
        end = hi[last]
        best = cur[end - lo[last]]
    return steps, end, best


@njit(cache=True)
def _backtrack(steps, lo, hi, offs, end):
    n = lo.shape[0]
    cap = n + (hi[n - 1] + 2)
    pi = np.empty(cap, dtype=np.int64)
    pj = np.empty(cap, dtype=np.int64)
    i = n - 1
    j = end
    m = 0
    while True:
        pi[m] = i
        pj[m] = j
        m += 1
        code = steps[offs[i] + j - lo[i]]
        if code == 3:
            break
        if code == 0:
            i -= 1
            j -= 1
        elif code == 1:
            i -= 1
        elif code == 2:
            j -= 1
        else:
            return pi[:0], pj[:0]
        if i < 0 or j < 0 or m >= cap:
            return pi[:0], pj[:0]
    return pi[:m][::-1].copy(), pj[:m][::-1].copy()


@njit(cache=True)
def _path_costs(cs, cr, os_, or_, w_on, pi, pj):
    out = np.empty(pi.shape[0])
    for k in range(pi.shape[0]):
        out[k] = _cell_cost(cs, cr, os_, or_, w_on, pi[k], pj[k])
    return out


def _as2d(a, n):
    if a is None:
        return np.zeros((n, 0), dtype=np.float64)
    return np.ascontiguousarray(a, dtype=np.float64)


def _inputs(chroma_s, chroma_r, onset_s, onset_r):
    """Contiguous float64 chroma of both sides and their onset features (none on either side
    when their widths differ)."""
    cs = np.ascontiguousarray(chroma_s, dtype=np.float64)
    cr = np.ascontiguousarray(chroma_r, dtype=np.float64)
    os_ = _as2d(onset_s, cs.shape[0])
    or_ = _as2d(onset_r, cr.shape[0])
    if os_.shape[1] != or_.shape[1]:
        os_, or_ = os_[:, :0], or_[:, :0]
    return cs, cr, os_, or_


def banded_dtw(
    chroma_s,
    chroma_r,
    lo,
    hi,
    *,
    onset_s=None,
    onset_r=None,
    onset_weight: float = 0.0,
    weights: StepWeights = StepWeights(),
    open_start: bool = True,
    open_end: bool = True,
):
    """DTW restricted to a band; returns ``(path (L, 2) int array, accumulated cost)``.

    ``lo`` and ``hi`` (length ``N``, non-decreasing, ``0 <= lo <= hi < M``) give the columns
    allowed in each row. Raises :class:`ValueError` when no path fits the band.
    """
    cs, cr, os_, or_ = _inputs(chroma_s, chroma_r, onset_s, onset_r)
    lo = np.ascontiguousarray(lo, dtype=np.int64)
    hi = np.ascontiguousarray(hi, dtype=np.int64)
    offs = np.zeros(lo.size + 1, dtype=np.int64)
    np.cumsum(hi - lo + 1, out=offs[1:])
    steps, end, cost = _dtw_band(cs, cr, os_, or_, float(onset_weight), lo, hi, offs,
                                 weights.diag, weights.score, weights.rec, open_start, open_end,
                                 np.zeros(0, dtype=np.float32))
    if end < 0 or not np.isfinite(cost):
        raise ValueError("no warping path fits the band")
    pi, pj = _backtrack(steps, lo, hi, offs, end)
    if pi.size == 0 or pi[0] != 0:
        raise ValueError("no warping path fits the band")
    return np.stack([pi, pj], axis=1), float(cost)


@njit(cache=True)
def _row_margins(tot, lo, hi, offs, dists):
    """Per row: the smallest total and, per distance d, the smallest total at least d columns away
    from the column of the smallest (inf when the band holds no such cell)."""
    n = lo.shape[0]
    out = np.full((n, dists.shape[0] + 1), np.inf)
    for i in range(n):
        b = offs[i]
        m = hi[i] - lo[i] + 1
        best = np.inf
        kb = 0
        for k in range(m):
            v = tot[b + k]
            if v < best:
                best = v
                kb = k
        out[i, 0] = best
        for q in range(dists.shape[0]):
            d = dists[q]
            v2 = np.inf
            for k in range(m):
                if abs(k - kb) >= d and tot[b + k] < v2:
                    v2 = tot[b + k]
            out[i, q + 1] = v2 - best
    return out


def band_margins(chroma_s, chroma_r, lo, hi, *, onset_s=None, onset_r=None, onset_weight: float = 0.0,
                 weights: StepWeights = StepWeights(), distances=(5,)):
    """How much dearer the best path through each row becomes when it is moved by ``distances``.

    Forward accumulated costs ``F`` and backward ones ``B`` (the same recursion run on both
    sequences reversed) over the band give ``T = F + B``, the cost of the best path through each
    cell (up to the weight of the cell itself, counted on both sides). Per row ``i``:
    ``margins[i, q]`` = min over cells at least ``distances[q]`` columns from the row's best cell
    of ``T`` minus the row's best ``T`` (``inf`` where the band holds no such cell). A small
    margin means another placement of that score frame, ``distances[q]`` frames away, costs
    nearly as little: the alignment is unsure there (the min-sum analogue of a posterior).
    Returns an ``(N, len(distances))`` array.
    """
    cs, cr, os_, or_ = _inputs(chroma_s, chroma_r, onset_s, onset_r)
    lo = np.ascontiguousarray(lo, dtype=np.int64)
    hi = np.ascontiguousarray(hi, dtype=np.int64)
    n, m = cs.shape[0], cr.shape[0]
    offs = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(hi - lo + 1, out=offs[1:])
    fwd = np.empty(int(offs[-1]), dtype=np.float32)
    _dtw_band(cs, cr, os_, or_, float(onset_weight), lo, hi, offs, weights.diag, weights.score,
              weights.rec, True, True, fwd)
    # reversed problem: row n-1-i, column m-1-j; its band rows are the reversed rows' bands
    rlo = (m - 1 - hi[::-1]).copy()
    rhi = (m - 1 - lo[::-1]).copy()
    roffs = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(rhi - rlo + 1, out=roffs[1:])
    bwd_r = np.empty(int(roffs[-1]), dtype=np.float32)
    _dtw_band(cs[::-1].copy(), cr[::-1].copy(), os_[::-1].copy(), or_[::-1].copy(), float(onset_weight),
              rlo, rhi, roffs, weights.diag, weights.score, weights.rec, True, True, bwd_r)
    # cell (i, j) of the forward band is cell (n-1-i, m-1-j) of the reversed band; within a row
    # the reversed band runs backwards, so row i of the forward band is row n-1-i reversed
    tot = np.empty_like(fwd)
    for i in range(n):
        a, b = offs[i], offs[i + 1]
        ri = n - 1 - i
        tot[a:b] = fwd[a:b] + bwd_r[roffs[ri]:roffs[ri + 1]][::-1]
    res = _row_margins(tot.astype(np.float64), lo, hi, offs, np.asarray(distances, dtype=np.int64))
    return res[:, 1:], res[:, 0]


def path_costs(path, chroma_s, chroma_r, *, onset_s=None, onset_r=None, onset_weight: float = 0.0):
    """Local cost of every cell of ``path``."""
    cs, cr, os_, or_ = _inputs(chroma_s, chroma_r, onset_s, onset_r)
    p = np.asarray(path, dtype=np.int64)
    return _path_costs(cs, cr, os_, or_, float(onset_weight), p[:, 0].copy(), p[:, 1].copy())


def full_band(n_rows: int, n_cols: int):
    """The whole matrix as a band."""
    return np.zeros(n_rows, dtype=np.int64), np.full(n_rows, n_cols - 1, dtype=np.int64)


def constrain_band(lo, hi, anchors, *, n_cols: int):
    """Restrict a band so every path passes through the ``anchors`` (``(row, col)`` cells).

    Rows before an anchor may not go past its column, rows after it may not start before it.
    Returns new ``(lo, hi)``; raises :class:`ValueError` if the anchors are not increasing.
    """
    lo = np.array(lo, dtype=np.int64)
    hi = np.array(hi, dtype=np.int64)
    pts = sorted((int(r), int(c)) for r, c in anchors)
    for (r0, c0), (r1, c1) in zip(pts, pts[1:]):
        if not (r1 >= r0 and c1 >= c0):
            raise ValueError("anchors must increase in both score and recording time")
    for r, c in pts:
        c = min(max(c, 0), n_cols - 1)
        hi[:r] = np.minimum(hi[:r], c)
        lo[r + 1:] = np.maximum(lo[r + 1:], c)
        lo[r] = c
        hi[r] = c
    if np.any(lo > hi):
        raise ValueError("anchors leave no room for a path")
    return lo, hi


def band_from_path(path, *, factor: int, n_rows: int, n_cols: int, radius: int):
    """Project a coarse path to a ``factor`` times finer grid and widen it by ``radius`` cells.

    Every coarse cell ``(a, b)`` covers fine rows ``a*factor .. a*factor+factor-1`` and columns
    likewise. The band is then widened by ``radius`` in both directions and made monotone
    (``lo`` and ``hi`` non-decreasing) by widening, never by narrowing.
    """
    p = np.asarray(path, dtype=np.int64)
    lo = np.full(n_rows, n_cols, dtype=np.int64)
    hi = np.full(n_rows, -1, dtype=np.int64)
    for a, b in p:
        r0, r1 = a * factor, min((a + 1) * factor, n_rows)
        if r0 >= n_rows:
            r0 = n_rows - 1
            r1 = n_rows
        c0, c1 = b * factor, min((b + 1) * factor - 1, n_cols - 1)
        lo[r0:r1] = np.minimum(lo[r0:r1], c0)
        hi[r0:r1] = np.maximum(hi[r0:r1], c1)
    # rows not reached (ragged end): copy the nearest filled row
    filled = hi >= 0
    if not filled.all():
        idx = np.maximum.accumulate(np.where(filled, np.arange(n_rows), 0))
        lo, hi = lo[idx], hi[idx]
    if radius > 0:
        from scipy.ndimage import maximum_filter1d, minimum_filter1d

        size = 2 * radius + 1
        lo = minimum_filter1d(lo, size, mode="nearest") - radius
        hi = maximum_filter1d(hi, size, mode="nearest") + radius
    lo = np.minimum.accumulate(lo[::-1])[::-1]
    hi = np.maximum.accumulate(hi)
    lo = np.clip(lo, 0, n_cols - 1)
    hi = np.clip(hi, 0, n_cols - 1)
    return lo, hi


def downsample(x, factor: int):
    """Average ``factor`` consecutive frames (the last group may be shorter)."""
    x = np.asarray(x, dtype=np.float64)
    if factor <= 1 or x.shape[0] == 0:
        return x.copy()
    n = x.shape[0]
    g = -(-n // factor)
    pad = g * factor - n
    sums = np.add.reduceat(x, np.arange(0, n, factor), axis=0)
    counts = np.full(g, float(factor))
    if pad:
        counts[-1] = factor - pad
    return sums / counts[:, None]


def _unit(x):
    x = np.asarray(x, dtype=np.float64)
    nrm = np.linalg.norm(x, axis=1, keepdims=True)
    flat = np.full(x.shape[1], 1.0 / np.sqrt(x.shape[1]))
    out = np.where(nrm > 1e-9, x / np.maximum(nrm, 1e-12), flat)
    return out


def multiscale_dtw(
    chroma_s,
    chroma_r,
    *,
    onset_s=None,
    onset_r=None,
    onset_weight: float = 1.0,
    factors=(50, 5, 1),
    radii=(0, 10, 25),
    anchors=(),
    weights: StepWeights = StepWeights(),
):
    """Multiscale DTW from coarse to fine; returns a dict with the fine path and diagnostics.

    Parameters
    ----------
    chroma_s, chroma_r : ndarray (N, 13), (M, 13)
        Unit chroma of the score and the recording at the finest rate.
    onset_s, onset_r : ndarray or None
        Chroma-onset features, used at the finest level only (factor 1).
    factors : tuple of int
        Decimation of each level relative to the finest (first = coarsest, last must be 1).
    radii : tuple of int
        Band half-width in cells of each level around the projected path of the level above
        (the first level uses the whole matrix).
    anchors : sequence of (row, col)
        Fine-grid cells every path must pass through.

    Returns
    -------
    dict with ``path`` (L, 2) fine cells, ``levels`` (per level: factor, rows, cols, band cells,
    path, band ``lo``/``hi``), ``coarse_cost_ratio`` (mean path cost ÷ mean matrix cost at the coarsest level,
    Raffel & Ellis 2016) and ``band_cells`` (largest band stored).
    """
    levels = []
    path = None
    prev_factor = None
    coarse_ratio = float("nan")
    for li, (f, rad) in enumerate(zip(factors, radii)):
        if f > 1:
            cs = _unit(downsample(chroma_s, f))
            cr = _unit(downsample(chroma_r, f))
        else:
            cs, cr = np.asarray(chroma_s, np.float64), np.asarray(chroma_r, np.float64)
        nr, nc = len(cs), len(cr)
        if path is None:
            lo, hi = full_band(nr, nc)
        else:
            lo, hi = band_from_path(path, factor=prev_factor // f, n_rows=nr, n_cols=nc, radius=rad)
        if anchors:
            lo, hi = constrain_band(lo, hi, [(a // f, b // f) for a, b in anchors], n_cols=nc)
        use_on = f == 1 and onset_s is not None and onset_r is not None
        path, _ = banded_dtw(
            cs, cr, lo, hi,
            onset_s=onset_s if use_on else None,
            onset_r=onset_r if use_on else None,
            onset_weight=onset_weight if use_on else 0.0,
            weights=weights,
        )
        if li == 0:
            pc = path_costs(path, cs, cr)
            mean_matrix = 1.0 - float(cs.mean(axis=0) @ cr.mean(axis=0))
            coarse_ratio = float(pc.mean() / max(mean_matrix, 1e-9))
        levels.append({"factor": int(f), "rows": int(nr), "cols": int(nc),
                       "band_cells": int((hi - lo + 1).sum()), "path_length": int(len(path)),
                       "path": path, "lo": lo, "hi": hi})
        prev_factor = f
    return {
        "path": path,
        "levels": levels,
        "coarse_cost_ratio": coarse_ratio,
        "band_cells": max(lv["band_cells"] for lv in levels[1:]) if len(levels) > 1 else levels[0]["band_cells"],
    }


def key_shift_costs(chroma_s, chroma_r, *, factor: int = 25, weights: StepWeights = StepWeights()):
    """Mean path cost of an open-ended alignment for each of the 12 circular chroma shifts.

    Element ``k`` aligns the score against the recording chroma rotated by ``k`` semitones, at
    ``factor`` times the frame period. The right piece aligns far better unshifted than in any
    other key; a different piece does not (its unshifted cost is about the best shifted one).
    """
    cs = _unit(downsample(chroma_s, factor))
    cr = _unit(downsample(chroma_r, factor))
    lo, hi = full_band(len(cs), len(cr))
    out = np.empty(12)
    for k in range(12):
        crk = cr.copy()
        crk[:, :12] = np.roll(cr[:, :12], k, axis=1)   # the silence component stays
        p, _ = banded_dtw(cs, crk, lo, hi, weights=weights)
        out[k] = path_costs(p, cs, crk).mean()
    return out
