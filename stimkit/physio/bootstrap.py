"""The stationary bootstrap and its block length, for the optional interval of analysis A.

What it computes
----------------
- :func:`stationary_indices` -- resampling indices of the stationary bootstrap (Politis &
  Romano 1994): the first index is uniform on 0..n-1; each later one starts a new block at a
  uniform index with probability p = 1 / b and otherwise continues the block (the previous index
  + 1, wrapping round to 0 at the end). Block lengths are geometric with mean b, and the
  resampled series is stationary.
- :func:`block_length_constant` -- the constant C of the optimal expected block length
  b_opt = C n^(1/3) (Politis & White 2004, with the correction of Patton, Politis & White 2009):
  C = (2 G^2 / D_SB)^(1/3), G = sum_k lambda(k / M) |k| R(k), D_SB = 2 g(0)^2, g(0) = sum_k
  lambda(k / M) R(k) over k = -M..M, R the autocovariance and lambda the flat-top (trapezoid)
  lag window, 1 up to 1/2 and 2 (1 - |t|) up to 1. M = 2 m, with m the smallest lag after
  which K_n = max(5, ceil(log10 n)) autocorrelations in a row lie within 2 sqrt(log10 n / n),
  and at most ceil(sqrt n) + K_n. The autocovariances are pooled over the gap-free segments
  (each demeaned), so the constant describes the whole session series.
- :func:`optimal_block_length` -- C n^(1/3) for one series, capped at min(3 sqrt n, n / 3) as in
  Patton's reference code.
- :func:`bootstrap_delta_ci` -- the percentile interval of mean(after) - mean(before), both
  windows resampled independently by the stationary bootstrap with b = C N^(1/3) for a window of
  N values (the session's dependence, the window's length). Analysis A uses it only when
  b <= N / 4 (PHYSIO-STATS 2.2): longer blocks leave too few blocks in a window for the
  resampled means to vary as the real ones do; the ``pseudo`` interval is used instead.

For an AR(1) with coefficient phi, R(k) = s^2 phi^|k|, so G = 2 s^2 phi / (1 - phi)^2 and
g(0) = s^2 (1 + phi) / (1 - phi), giving C = (2 phi / (1 - phi^2))^(2/3) (the tests check the
estimate against it).

References
----------
Politis, D. N., & Romano, J. P. (1994). The stationary bootstrap. JASA 89, 1303-1313.
Politis, D. N., & White, H. (2004). Automatic block-length selection for the dependent
bootstrap. Econometric Reviews 23, 53-70. Patton, A., Politis, D. N., & White, H. (2009).
Correction to "Automatic block-length selection for the dependent bootstrap". Econometric
Reviews 28, 372-375.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["stationary_indices", "block_length_constant", "optimal_block_length", "bootstrap_delta_ci",
           "flat_top"]


def flat_top(t) -> np.ndarray:
    """The flat-top lag window of Politis & White (2004): 1 for |t| <= 1/2, 2 (1 - |t|) to 1, 0 after."""
    a = np.abs(np.asarray(t, dtype=np.float64))
    return np.where(a <= 0.5, 1.0, np.where(a <= 1.0, 2.0 * (1.0 - a), 0.0))


def stationary_indices(n: int, size: int, reps: int, block: float, rng: np.random.Generator) -> np.ndarray:
    """(reps, size) indices into a series of ``n`` values by the stationary bootstrap with mean
    block length ``block`` (Politis & Romano 1994; circular wrap)."""
    p = 1.0 / max(float(block), 1.0)
    idx = np.empty((reps, size), dtype=np.int64)
    idx[:, 0] = rng.integers(0, n, size=reps)
    if size > 1:
        new = rng.uniform(size=(reps, size - 1)) < p
        starts = rng.integers(0, n, size=(reps, size - 1))
        for j in range(1, size):
            idx[:, j] = np.where(new[:, j - 1], starts[:, j - 1], (idx[:, j - 1] + 1) % n)
    return idx


def _pooled_acv(segments, max_lag: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Pooled autocovariances R(0..max_lag) (divided by the total length) and autocorrelations."""
    segs = [np.asarray(s, dtype=np.float64) for s in segments]
    segs = [s - s.mean() for s in segs if s.size > 2]
    n = sum(s.size for s in segs)
    acv = np.zeros(max_lag + 1)
    for k in range(max_lag + 1):
        acv[k] = sum(float(np.dot(s[k:], s[: s.size - k])) for s in segs if s.size > k)
    acv /= max(n, 1)
    acf = acv / acv[0] if acv[0] > 0 else np.zeros_like(acv)
    return acv, acf, n


def block_length_constant(segments) -> float:
    """C with b_opt = C n^(1/3) for the stationary bootstrap (see module notes); NaN when the
    series is constant or too short."""
    segs = [np.asarray(s, dtype=np.float64) for s in segments]
    n = sum(s.size for s in segs if s.size > 2)
    if n < 10:
        return float("nan")
    kn = max(5, math.ceil(math.log10(n)))
    m_max = math.ceil(math.sqrt(n)) + kn
    acv, acf, n = _pooled_acv(segs, m_max + kn)
    if not acv[0] > 0:
        return float("nan")
    crit = 2.0 * math.sqrt(math.log10(n) / n)
    m_hat = None
    for m in range(m_max + 1):
        if np.all(np.abs(acf[m + 1:m + 1 + kn]) < crit):
            m_hat = m
            break
    M = min(2 * max(m_hat, 1), m_max) if m_hat is not None else m_max
    k = np.arange(1, M + 1)
    lam = flat_top(k / M)
    G = 2.0 * float(np.sum(lam * k * acv[1:M + 1]))
    g0 = acv[0] + 2.0 * float(np.sum(lam * acv[1:M + 1]))
    d_sb = 2.0 * g0 ** 2
    if not d_sb > 0:
        return float("nan")
    return float((2.0 * G ** 2 / d_sb) ** (1.0 / 3.0))


def optimal_block_length(x) -> float:
    """The Politis-White (Patton et al. 2009) expected block length of the stationary bootstrap
    for one series, at least 1 and at most min(3 sqrt n, n / 3)."""
    x = np.asarray(x, dtype=np.float64)
    c = block_length_constant([x])
    if not np.isfinite(c):
        return float("nan")
    n = x.size
    return float(min(max(c * n ** (1.0 / 3.0), 1.0), math.ceil(min(3 * math.sqrt(n), n / 3))))


def bootstrap_delta_ci(after, before, *, constant: float, reps: int, rng: np.random.Generator,
                       level: float = 0.95, max_block_share: float = 0.25):
    """Percentile interval of mean(after) - mean(before) by the stationary bootstrap of each
    window with b = max(1, constant N^(1/3)); ``(low, high, block)``, or ``(nan, nan, block)``
    when b > ``max_block_share`` x the shorter window (module notes)."""
    a, b = np.asarray(after, dtype=np.float64), np.asarray(before, dtype=np.float64)
    n = min(a.size, b.size)
    if n < 2 or not np.isfinite(constant):
        return float("nan"), float("nan"), float("nan")
    block = max(1.0, constant * n ** (1.0 / 3.0))
    if block > max_block_share * n:
        return float("nan"), float("nan"), block
    ia = stationary_indices(a.size, a.size, reps, max(1.0, constant * a.size ** (1.0 / 3.0)), rng)
    ib = stationary_indices(b.size, b.size, reps, max(1.0, constant * b.size ** (1.0 / 3.0)), rng)
    d = a[ia].mean(axis=1) - b[ib].mean(axis=1)
    tail = (1.0 - level) / 2.0
    lo, hi = np.quantile(d, [tail, 1.0 - tail])
    return float(lo), float(hi), block
