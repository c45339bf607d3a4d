"""Loudness after ITU-R BS.1770-4 and EBU R 128 (Tech 3341, Tech 3342), computed by streaming.

What it computes
----------------
- K-weighting at any sample rate (:func:`k_weighting_sos`), channel weights
  (:func:`channel_weights`).
- A streaming meter (:class:`LoudnessMeter`): push blocks of samples, then ask for momentary
  (0.4 s) and short-term (3 s) loudness at any window centres, integrated loudness (gated),
  loudness range (LRA), maximum momentary / short-term loudness, sample peak and true peak.
- :class:`EnergyGrid`: the shared machinery -- sums of a per-sample power on a fixed 5 ms grid,
  so that windows of any length on that grid are exact sums, whatever the block cuts.

Conventions
-----------
- Time is ``recording`` time (seconds from the first sample pushed). A window's time is its
  **centre**; windows reaching outside the signal use the part inside it (mean power over the
  samples present), so values near the start and end are measured on shorter windows.
- Grid: sub-block ``k`` covers samples ``[round(k*fs/200), round((k+1)*fs/200))``; window edges are
  rounded to this 5 ms grid (at most 2.5 ms off). Integrated loudness and LRA use only windows
  that lie wholly inside the signal, as the standards require.
- Loudness in LUFS (= LKFS), ranges in LU, sample peak in dBFS, true peak in dBTP.
  ``-inf`` (digital silence) is returned as ``-inf``; callers floor or write ``n/a``.
- Channels: BS.1770 weights -- 1.0 for L, R, C; 1.41 for surround channels; LFE excluded --
  under the usual file channel orders (see :func:`channel_weights`).

Method
------
K-weighting: two biquads (shelf + high-pass) from the analog prototype whose pre-warped bilinear
transform reproduces the 48 kHz coefficients of BS.1770 Tables 1-2 (the standard gives no method
for other rates). Loudness = -0.691 + 10 log10(sum_i G_i z_i). Integrated: 400 ms blocks, 75 %
overlap, absolute gate -70 LUFS, relative gate -10 LU, energy mean. LRA (Tech 3342): short-term
values at 10 Hz, absolute gate -70 LUFS, relative gate -20 LU, 95th minus 10th percentile.
Maximum momentary / short-term: over full windows on the 5 ms grid (Tech 3341 asks for <= 10 ms).
True peak: 4x oversampling with a 48-tap Kaiser-windowed interpolator (BS.1770-4 Annex 2 uses a
48-tap, 4-phase filter); stretches whose bound cannot exceed the running peak are skipped, which
leaves the result unchanged. The per-sample loops (K-weighting with the same transposed direct
form II as ``scipy.signal.sosfilt``, and the oversampling) are numba kernels that release the GIL,
so the meter can run in a thread beside the spectral analysis.

References
----------
ITU-R BS.1770-4 (2015), Algorithms to measure audio programme loudness and true-peak audio level.
EBU R 128 (2020); EBU Tech 3341 (2016) Loudness metering: 'EBU Mode' metering; EBU Tech 3342 (2016)
Loudness range. B. De Man (analog prototype of the K-weighting filter, as used by pyloudnorm's
"DeMan" filter class).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .read import as_block

__all__ = ["k_weighting_sos", "channel_weights", "EnergyGrid", "LoudnessMeter", "power_to_lufs",
           "GRID_STEP_S", "MOMENTARY_S", "SHORT_TERM_S", "true_peak_filter"]

GRID_STEP_S = 0.005
GRID_PER_S = 200  # sub-blocks per second (1 / GRID_STEP_S)
MOMENTARY_S = 0.4
SHORT_TERM_S = 3.0
ABSOLUTE_GATE_LUFS = -70.0
RELATIVE_GATE_LU = -10.0
LRA_RELATIVE_GATE_LU = -20.0
LRA_HOP_S = 0.1
_TP_CHUNK = 64  # true-peak positions are skipped or computed in chunks of this many
CLIP_LEVEL = 1.0 - 2.0 ** -15  # a sample frame with any channel this close to full scale counts as clipped

# analog prototype of the K-weighting filter (reproduces BS.1770 Tables 1-2 at 48 kHz)
_SHELF_F0_HZ = 1681.974450955533
_SHELF_GAIN_DB = 3.999843853973347
_SHELF_Q = 0.7071752369554196
_SHELF_VB_EXP = 0.4996667741545416
_HP_F0_HZ = 38.13547087602444
_HP_Q = 0.5003270373238773


@numba.njit(cache=True, nogil=True)
def _kweight_pass(x, sos, zi, weights, power, cmax, offset, chunk):  # pragma: no cover - compiled
    """One pass over ``x`` (n, ch): K-weighting biquads (transposed direct form II, as
    ``scipy.signal.sosfilt``, state ``zi`` (sections, 2, ch) updated in place), the weighted sum of
    squares per sample into ``power``, and the largest |sample| over channels folded into
    ``cmax[(i + offset) // chunk]`` (the true-peak chunks). Returns the number of sample frames
    with a channel at or above ``CLIP_LEVEL``."""
    n, ch = x.shape
    ns = sos.shape[0]
    clipped = 0
    for i in range(n):
        acc = 0.0
        am = 0.0
        for c in range(ch):
            v = np.float64(x[i, c])
            a = abs(v)
            if a > am:
                am = a
            for k in range(ns):
                y = sos[k, 0] * v + zi[k, 0, c]
                zi[k, 0, c] = sos[k, 1] * v - sos[k, 4] * y + zi[k, 1, c]
                zi[k, 1, c] = sos[k, 2] * v - sos[k, 5] * y
                v = y
            acc += weights[c] * v * v
        power[i] = acc
        if am >= CLIP_LEVEL:
            clipped += 1
        k = (i + offset) // chunk
        if am > cmax[k]:
            cmax[k] = am
    return clipped


@numba.njit(cache=True, nogil=True)
def _true_peak_chunks(hist, x, hot, chunk, hp, peak):  # pragma: no cover - compiled
    """Largest |oversampled value| at the positions of the ``hot`` chunks of ``seg = [hist, x]``
    (``hist``: the last samples of the previous block); the output between inputs i-1 and i is
    ``sum_j hp[j, p] * seg[i - j]``."""
    T, P = hp.shape
    nh = hist.shape[0]
    n = x.shape[0] + nh
    ch = x.shape[1]
    for h in hot:
        lo = max(h * chunk, T - 1)
        hi = min(h * chunk + chunk, n)
        for i in range(lo, hi):
            for c in range(ch):
                for p in range(P):
                    acc = 0.0
                    for j in range(T):
                        k = i - j
                        v = hist[k, c] if k < nh else np.float64(x[k - nh, c])
                        acc += hp[j, p] * v
                    a = abs(acc)
                    if a > peak:
                        peak = a
    return peak


def k_weighting_sos(sample_rate_hz: float) -> np.ndarray:
    """K-weighting as second-order sections ``(2, 6)`` (shelf, then high-pass) at any rate."""
    fs = float(sample_rate_hz)
    k = math.tan(math.pi * _SHELF_F0_HZ / fs)
    vh = 10.0 ** (_SHELF_GAIN_DB / 20.0)
    vb = vh ** _SHELF_VB_EXP
    a0 = 1.0 + k / _SHELF_Q + k * k
    shelf = [(vh + vb * k / _SHELF_Q + k * k) / a0, 2.0 * (k * k - vh) / a0,
             (vh - vb * k / _SHELF_Q + k * k) / a0,
             1.0, 2.0 * (k * k - 1.0) / a0, (1.0 - k / _SHELF_Q + k * k) / a0]
    k = math.tan(math.pi * _HP_F0_HZ / fs)
    d = 1.0 + k / _HP_Q + k * k
    hp = [1.0, -2.0, 1.0, 1.0, 2.0 * (k * k - 1.0) / d, (1.0 - k / _HP_Q + k * k) / d]
    return np.array([shelf, hp], dtype=np.float64)


def channel_weights(n_channels: int) -> np.ndarray:
    """BS.1770 channel weights for a file's channel order.

    1: mono [1]; 2: L R [1, 1]; 3: L R C [1, 1, 1]; 4: L R Ls Rs [1, 1, 1.41, 1.41];
    5: L R C Ls Rs [1, 1, 1, 1.41, 1.41] (EBU Tech 3341 case 6); 6: L R C LFE Ls Rs
    [1, 1, 1, 0, 1.41, 1.41] (WAVE / SMPTE 5.1 order); 8: L R C LFE + four surround/back
    [1, 1, 1, 0, 1.41 x 4] (WAVE 7.1 order). Any other count: 1.0 for every channel.
    """
    table = {1: [1.0], 2: [1.0, 1.0], 3: [1.0, 1.0, 1.0], 4: [1.0, 1.0, 1.41, 1.41],
             5: [1.0, 1.0, 1.0, 1.41, 1.41], 6: [1.0, 1.0, 1.0, 0.0, 1.41, 1.41],
             8: [1.0, 1.0, 1.0, 0.0, 1.41, 1.41, 1.41, 1.41]}
    return np.array(table.get(int(n_channels), [1.0] * int(n_channels)), dtype=np.float64)


def power_to_lufs(power) -> np.ndarray:
    """``-0.691 + 10 log10(power)``; ``-inf`` for zero power, NaN stays NaN."""
    p = np.asarray(power, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return -0.691 + 10.0 * np.log10(p)


def true_peak_filter(taps: int = 48, up: int = 4) -> np.ndarray:
    """Interpolation low-pass for ``up``-times oversampling (gain ``up``, cut-off at the input
    Nyquist): a Kaiser-windowed (beta 8) sinc of ``taps`` taps scaled to unit DC gain, then times
    ``up`` -- the window method as ``scipy.signal.firwin(taps, 1 / up, window=("kaiser", 8))``
    computes it (the test compares the two), written with numpy so that the meter does not
    import ``scipy.signal``."""
    m = np.arange(taps) - 0.5 * (taps - 1)
    cut = 1.0 / up  # relative to the Nyquist frequency
    h = cut * np.sinc(cut * m) * np.kaiser(taps, 8.0)
    return h / h.sum() * up


class EnergyGrid:
    """Sums of a per-sample quantity on the fixed 5 ms grid, fed block by block.

    ``sums[k]`` is the sum over the samples of sub-block ``k`` and ``counts[k]`` their number; the
    boundaries are integers ``(k*fs + 100) // 200`` so they do not depend on the block cuts.
    """

    def __init__(self, *, sample_rate_hz: int):
        self.fs = int(sample_rate_hz)
        self.n = 0  # samples pushed
        self._chunks: list[np.ndarray] = []
        self._carry = 0.0  # partial sum of the open sub-block
        self._k = 0  # index of the open sub-block

    def _bound(self, k):
        return (np.asarray(k, dtype=np.int64) * self.fs + GRID_PER_S // 2) // GRID_PER_S

    def push(self, values: np.ndarray) -> None:
        v = np.asarray(values, dtype=np.float64)
        m = v.shape[0]
        if m == 0:
            return
        s0, s1 = self.n, self.n + m
        # sub-blocks that close inside this block: k with bound(k+1) <= s1
        k_last = int((s1 * GRID_PER_S + GRID_PER_S // 2) // self.fs) + 2
        ks = np.arange(self._k, k_last + 1)
        ends = self._bound(ks + 1)
        ks, ends = ks[ends <= s1], ends[ends <= s1]
        if ks.size:
            starts = np.maximum(self._bound(ks), s0) - s0
            sums = np.add.reduceat(v, starts)[: ks.size] if starts[0] < m else np.zeros(ks.size)
            # reduceat gives v[starts[i]:starts[i+1]]; the last closed sub-block ends at ends[-1]
            last_end = int(ends[-1]) - s0
            sums[-1] -= v[last_end:].sum() if last_end < m else 0.0
            sums[0] += self._carry
            self._chunks.append(sums)
            self._k = int(ks[-1]) + 1
            self._carry = float(v[last_end:].sum())
        else:
            self._carry += float(v.sum())
        self.n = s1

    def finish(self) -> tuple[np.ndarray, np.ndarray]:
        """``(sums, counts)`` including the trailing partial sub-block."""
        sums = np.concatenate(self._chunks) if self._chunks else np.zeros(0)
        self._chunks = [sums] if sums.size else []  # one copy only
        k_full = sums.shape[0]
        counts = np.diff(self._bound(np.arange(k_full + 1))).astype(np.float64)
        tail = self.n - int(self._bound(k_full))
        if tail > 0:
            sums = np.append(sums, self._carry)
            counts = np.append(counts, float(tail))
        return sums, counts

    @property
    def full_subblocks(self) -> int:
        return self._k


def _window_sums(sums: np.ndarray, counts: np.ndarray, i0: np.ndarray, i1: np.ndarray,
                 step: int = 1 << 16) -> tuple[np.ndarray, np.ndarray]:
    """Sums of ``sums`` and ``counts`` over sub-blocks ``[i0[m], i1[m])`` (indices already clipped,
    ``i0`` non-decreasing), by cumulative sums over chunks of the grid (bounded memory, and each
    chunk's cumulative sum restarts, which keeps the precision of quiet parts after loud ones)."""
    e = np.zeros(i0.shape[0])
    n = np.zeros(i0.shape[0])
    if i0.size == 0:
        return e, n
    K = sums.shape[0]
    for a in range(0, K + 1, step):
        m0, m1 = np.searchsorted(i0, [a, a + step], side="left")
        if m1 <= m0:
            continue
        lo = a
        hi = int(max(i1[m0:m1].max(), lo))
        cs = np.concatenate([[0.0], np.cumsum(sums[lo:hi])])
        cn = np.concatenate([[0.0], np.cumsum(counts[lo:hi])])
        j0, j1 = i0[m0:m1] - lo, np.maximum(i1[m0:m1], i0[m0:m1]) - lo
        e[m0:m1] = cs[j1] - cs[j0]
        n[m0:m1] = cn[j1] - cn[j0]
    return e, n


def window_mean(sums: np.ndarray, counts: np.ndarray, *, centres_s, window_s: float,
                full_only: bool = False, n_full: int | None = None) -> np.ndarray:
    """Mean of the underlying quantity over windows centred at ``centres_s`` (5 ms grid).

    Windows are clipped to the signal; with ``full_only`` a window not wholly inside the first
    ``n_full`` sub-blocks gives NaN.
    """
    K = sums.shape[0]
    c = np.asarray(centres_s, dtype=np.float64)
    i0 = np.floor((c - window_s / 2.0) * GRID_PER_S + 0.5).astype(np.int64)
    i1 = i0 + int(round(window_s * GRID_PER_S))
    limit = K if n_full is None else n_full
    bad = (i0 < 0) | (i1 > limit) if full_only else np.zeros(c.shape, dtype=bool)
    order = np.argsort(i0, kind="stable")
    e, n = np.empty(c.shape), np.empty(c.shape)
    e[order], n[order] = _window_sums(sums, counts, np.clip(i0[order], 0, K), np.clip(i1[order], 0, K))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(n > 0, e / np.where(n > 0, n, 1.0), np.nan)
    out = np.maximum(out, 0.0)  # cumulative-sum rounding can leave tiny negatives
    out[bad] = np.nan
    return out


def _full_windows(sums, counts, n_full, *, window_s: float, hop_s: float) -> np.ndarray:
    """Mean power of all full windows of ``window_s`` starting at multiples of ``hop_s``."""
    w = int(round(window_s * GRID_PER_S))
    h = int(round(hop_s * GRID_PER_S))
    if n_full < w:
        return np.zeros(0)
    starts = np.arange(0, n_full - w + 1, h)
    e, n = _window_sums(sums, counts, starts, starts + w)
    return np.maximum(e / n, 0.0)


def _max_full_window(sums, counts, n_full, *, window_s: float, step: int = 1 << 16) -> float:
    """Largest mean power over full windows of ``window_s`` starting on every grid point, computed
    in chunks so that memory does not grow with the signal (NaN if no full window)."""
    w = int(round(window_s * GRID_PER_S))
    if n_full < w:
        return float("nan")
    best = -np.inf
    for a in range(0, n_full - w + 1, step):
        b = min(n_full - w + 1, a + step)  # window starts a .. b-1
        cs = np.concatenate([[0.0], np.cumsum(sums[a:b + w - 1])])
        cn = np.concatenate([[0.0], np.cumsum(counts[a:b + w - 1])])
        m = (cs[w:] - cs[:-w]) / (cn[w:] - cn[:-w])
        best = max(best, float(m.max()))
    return max(best, 0.0)


def _gate(power: np.ndarray, relative_lu: float):
    """The two gates of BS.1770 / Tech 3342 -> ``(lk, mask)``: the loudness of each power, and the
    mask of those above the absolute gate and above the mean of the absolutely gated powers plus
    ``relative_lu``; the mask is None when nothing passes the absolute gate."""
    lk = power_to_lufs(power)
    above = lk > ABSOLUTE_GATE_LUFS
    if not above.any():
        return lk, None
    rel = float(power_to_lufs(power[above].mean())) + relative_lu
    return lk, above & (lk > rel)


def gated_integrated(block_power: np.ndarray) -> float:
    """BS.1770-4 gated integration of 400 ms block powers -> LUFS (``-inf``/NaN if nothing passes)."""
    _, keep = _gate(block_power, RELATIVE_GATE_LU)
    if keep is None:
        return float("nan")
    return float(power_to_lufs(block_power[keep].mean()))


def loudness_range(short_term_power: np.ndarray) -> float:
    """EBU Tech 3342 LRA in LU from short-term powers (NaN if none pass the gates)."""
    lk, keep = _gate(short_term_power, LRA_RELATIVE_GATE_LU)
    if keep is None:
        return float("nan")
    vals = lk[keep]
    if vals.size == 0:
        return float("nan")
    return float(np.percentile(vals, 95) - np.percentile(vals, 10))


class LoudnessMeter:
    """Streaming BS.1770 / EBU R 128 meter.

    Push blocks of shape ``(n, channels)`` (float, full scale 1.0) in order with :meth:`push`; the
    filter state and the 5 ms energy grid carry across blocks, so results do not depend on the
    block cuts. Then read values with :meth:`momentary`, :meth:`short_term`, :meth:`summary`.

    Parameters
    ----------
    sample_rate_hz : int
    channels : int
    weights : array_like, optional
        Channel weights; default :func:`channel_weights`.
    true_peak : bool
        Measure the 4x-oversampled true peak (default True).
    """

    def __init__(self, *, sample_rate_hz: int, channels: int, weights=None, true_peak: bool = True):
        self.fs = int(sample_rate_hz)
        self.channels = int(channels)
        self.weights = channel_weights(channels) if weights is None else np.asarray(weights, float)
        self._sos = k_weighting_sos(self.fs)
        self._zi = np.zeros((self._sos.shape[0], 2, self.channels))
        self.grid = EnergyGrid(sample_rate_hz=self.fs)
        self.sample_peak = 0.0
        self._tp = true_peak
        up = 4
        self._hphase = np.ascontiguousarray(true_peak_filter(up=up).reshape(-1, up))  # h[up*j + p] at [j, p]
        self._taps_phase = self._hphase.shape[0]
        self._l1 = float(np.abs(self._hphase).sum(axis=0).max())
        self._hist = np.zeros((self._taps_phase - 1, self.channels))
        self._hist_abs = 0.0  # largest |sample| of the history
        self.clipped_samples = 0
        self.true_peak = 0.0
        self._result = None

    # -- feeding -------------------------------------------------------------------------
    def push(self, block: np.ndarray) -> None:
        x = np.ascontiguousarray(as_block(block))
        if x.shape[0] == 0:
            return
        n = x.shape[0]
        T, C = self._taps_phase, _TP_CHUNK
        # positions of seg = [T-1 samples of history, x], cut in chunks of C (T - 1 < C)
        n_in = n + T - 1
        cmax = np.zeros(-(-n_in // C))
        cmax[0] = self._hist_abs
        power = np.empty(n)
        self.clipped_samples += int(_kweight_pass(x, self._sos, self._zi, self.weights, power, cmax,
                                                  T - 1, C))
        self.grid.push(power)
        del power
        top = float(cmax.max())
        self.sample_peak = max(self.sample_peak, top)
        if self._tp:
            self._true_peak_block(x, cmax, top)
        self._result = None

    def _true_peak_block(self, x: np.ndarray, cmax: np.ndarray, top: float) -> None:
        """Raise ``true_peak`` with the 4x-oversampled values of this block.

        Output samples between input ``i-1`` and ``i`` are ``sum_j h[4j+p] x[i-j]``; their size is
        at most ``L1 * max|x[i-T+1..i]|`` (``L1`` the largest per-phase tap sum), so only the
        chunks of positions whose bound exceeds the running peak are computed. ``cmax`` is the
        largest |sample| per chunk of ``[T-1 samples of history, x]``.
        """
        T = self._taps_phase
        self.true_peak = max(self.true_peak, top)
        # output samples between inputs i-1 and i need seg[i-T+1 .. i]: bound per chunk from the
        # chunk and the one before (T - 1 < C)
        bound = cmax.copy()
        bound[1:] = np.maximum(cmax[1:], cmax[:-1])
        hot = np.flatnonzero(bound > self.true_peak / self._l1)
        hist = self._hist
        self._hist = np.concatenate([hist, x[-(T - 1):].astype(np.float64)], axis=0)[-(T - 1):]
        self._hist_abs = float(np.abs(self._hist).max())
        if hot.size == 0:
            return
        self.true_peak = float(_true_peak_chunks(hist, x, hot.astype(np.int64), _TP_CHUNK,
                                                 self._hphase, self.true_peak))

    # -- reading -------------------------------------------------------------------------
    def _grid(self):
        if self._result is None:
            sums, counts = self.grid.finish()
            self._result = (sums, counts, self.grid.full_subblocks)
        return self._result

    @property
    def duration_s(self) -> float:
        return self.grid.n / self.fs

    def momentary(self, centres_s, *, full_only: bool = False) -> np.ndarray:
        """Momentary loudness (LUFS) of 0.4 s windows centred at ``centres_s``."""
        s, c, nf = self._grid()
        return power_to_lufs(window_mean(s, c, centres_s=centres_s, window_s=MOMENTARY_S,
                                         full_only=full_only, n_full=nf))

    def short_term(self, centres_s, *, full_only: bool = False) -> np.ndarray:
        """Short-term loudness (LUFS) of 3 s windows centred at ``centres_s``."""
        s, c, nf = self._grid()
        return power_to_lufs(window_mean(s, c, centres_s=centres_s, window_s=SHORT_TERM_S,
                                         full_only=full_only, n_full=nf))

    def level(self, centres_s, *, window_s: float) -> np.ndarray:
        """K-weighted loudness (LUFS) over windows of any length on the 5 ms grid."""
        s, c, nf = self._grid()
        return power_to_lufs(window_mean(s, c, centres_s=centres_s, window_s=window_s))

    def grid_level(self, *, window_s: float) -> np.ndarray:
        """K-weighted loudness (LUFS, float32) of ``window_s`` windows centred on every grid point
        ``i * 5 ms`` (``i = 0 .. K``), clipped at the signal edges; ``-inf`` for digital silence."""
        s, c, nf = self._grid()
        w = max(2, int(round(window_s * GRID_PER_S)) // 2 * 2)
        k = s.shape[0]
        h = w // 2
        out = np.empty(k + 1, dtype=np.float32)
        step = 1 << 16
        # window of grid point i: sub-blocks [i - h, i + h), clipped; computed in chunks
        for a in range(0, k + 1, step):
            b = min(k + 1, a + step)
            lo, hi = max(0, a - h), min(k, b + h)
            cs = np.concatenate([[0.0], np.cumsum(s[lo:hi])])
            cn = np.concatenate([[0.0], np.cumsum(c[lo:hi])])
            i = np.arange(a, b)
            j0 = np.clip(i - h, lo, hi) - lo
            j1 = np.clip(i + h, lo, hi) - lo
            with np.errstate(divide="ignore", invalid="ignore"):
                out[a:b] = power_to_lufs(np.maximum(cs[j1] - cs[j0], 0.0) / (cn[j1] - cn[j0]))
        return out

    def integrated(self) -> float:
        s, c, nf = self._grid()
        return gated_integrated(_full_windows(s, c, nf, window_s=MOMENTARY_S, hop_s=0.1))

    def loudness_range(self) -> float:
        s, c, nf = self._grid()
        return loudness_range(_full_windows(s, c, nf, window_s=SHORT_TERM_S, hop_s=LRA_HOP_S))

    def max_momentary(self) -> float:
        s, c, nf = self._grid()
        return float(power_to_lufs(_max_full_window(s, c, nf, window_s=MOMENTARY_S)))

    def max_short_term(self) -> float:
        s, c, nf = self._grid()
        return float(power_to_lufs(_max_full_window(s, c, nf, window_s=SHORT_TERM_S)))

    def summary(self) -> dict:
        """Whole-signal values (LUFS, LU, dBFS, dBTP); NaN where undefined (too short / silent)."""
        with np.errstate(divide="ignore"):
            sp = 20.0 * math.log10(self.sample_peak) if self.sample_peak > 0 else float("-inf")
            tp = 20.0 * math.log10(self.true_peak) if self._tp and self.true_peak > 0 else float("-inf")
        return {
            "integrated_lufs": self.integrated(),
            "lra_lu": self.loudness_range(),
            "max_momentary_lufs": self.max_momentary(),
            "max_short_term_lufs": self.max_short_term(),
            "sample_peak_dbfs": sp,
            "true_peak_dbtp": tp if self._tp else float("nan"),
        }


def measure(samples: np.ndarray, *, sample_rate_hz: int, block_s: float = 5.0, **kw) -> LoudnessMeter:
    """Convenience: a :class:`LoudnessMeter` fed with an in-memory array (cut into blocks)."""
    x = np.asarray(samples, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    m = LoudnessMeter(sample_rate_hz=sample_rate_hz, channels=x.shape[1], **kw)
    step = max(1, int(round(block_s * sample_rate_hz)))
    for i in range(0, x.shape[0], step):
        m.push(x[i:i + step])
    return m
