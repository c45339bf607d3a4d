"""Change points in the continuous features: Foote's checkerboard novelty, without the matrix.

What it computes
----------------
A novelty curve over recording time and its peaks, the moments where the feature vector before
differs most from the one after. Each feature column is standardized (z-score over the whole
frame, so steps are in standard deviations); the self-similarity of frames i, j is the negative
squared Euclidean distance ``-||x_i - x_j||^2``; the novelty at frame t is the correlation of the
self-similarity matrix around (t, t) with a Gaussian-tapered checkerboard kernel
``K(a, b) = sign(a) sign(b) g(a) g(b)`` (Foote 2000).

Because that kernel is separable and its weights ``u(a) = sign(a) g(a)`` sum to zero, the
kernel correlation reduces exactly to ``N(t) = 2 ||sum_a u(a) x_{t+a}||^2``: the squared norm of
the features filtered by an antisymmetric tapered step. So no N x N matrix is formed: the cost is
O(N * D * L) for N frames, D features and a kernel of 2L frames, and hour-long sessions at 10 Hz
are cheap. Dividing the filtered vector by ``sum_{a>0} g(a)`` gives ``step``: the (tapered)
mean after minus mean before, per feature, in SD units; ``strength = ||step||`` is reported.

Conventions
-----------
- Input: a feature frame indexed by frame-centre time in seconds (recording time), evenly
  spaced; by default one column per musical aspect (see :func:`novelty_curve`); non-numeric
  columns are ignored, NaN gaps linearly interpolated, constant columns dropped. Loudness
  values below -70 LUFS (the BS.1770 absolute gate; digital silence) are clipped to -70 first
  so that a silence floor such as -120 does not dominate the distance.
- Kernel: ``half_width_s`` each side (default 5 s, the usual before/after window of
  event-related physiology, common practice), Gaussian taper with SD ``half_width_s / 2``.
  Novelty is only evaluated where the whole kernel fits inside a span (a piece), so a span's
  first and last ``half_width_s`` never hold a change point.
- Peaks: local maxima of strength at least ``min_strength_sd`` (default 1.0 SD) and at least
  ``min_distance_s`` apart (default 5 s), via ``scipy.signal.find_peaks``.

References
----------
Foote, J. (2000). Automatic audio segmentation using a measure of audio novelty. Proc. IEEE
International Conference on Multimedia and Expo (ICME), 452-455.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.signal import find_peaks

from ..errors import WorkFailed
from .roles import change_columns

__all__ = ["standardize_features", "novelty_curve", "change_points", "GATE_LUFS"]

#: ITU-R BS.1770-4 absolute gate; lower loudness values are clipped to it before standardizing.
GATE_LUFS = -70.0


def standardize_features(features: pd.DataFrame, *, columns: list[str] | None = None) -> pd.DataFrame:
    """Numeric columns as z-scores (NaN gaps interpolated, constant columns dropped)."""
    cols = list(columns) if columns is not None else [
        c for c in features.columns if pd.api.types.is_numeric_dtype(features[c])
        and not pd.api.types.is_bool_dtype(features[c])]
    out = {}
    for c in cols:
        v = pd.to_numeric(features[c], errors="coerce").astype(np.float64)
        v = v.where(np.isfinite(v))
        if str(c).endswith("lufs"):
            v = v.clip(lower=GATE_LUFS)
        if v.notna().sum() < 2:
            continue
        v = v.interpolate(limit_direction="both")
        sd = float(v.std(ddof=0))
        if not np.isfinite(sd) or sd <= 1e-12 * max(1.0, abs(float(v.mean()))):
            continue
        out[str(c)] = (v - v.mean()) / sd
    return pd.DataFrame(out, index=features.index)


def _taper(half: int) -> np.ndarray:
    """Antisymmetric tapered step u(a) for a = -half..-1, 1..half (2*half values, past first)."""
    a = np.arange(1, half + 1) - 0.5
    g = np.exp(-0.5 * (a / (half / 2.0)) ** 2)
    return np.concatenate([-g[::-1], g])


def _step_vectors(z: np.ndarray, half: int) -> np.ndarray:
    """Per frame t, the tapered mean of frames t..t+half-1 minus that of t-half..t-1 (NaN at edges)."""
    n, d = z.shape
    u = _taper(half)
    norm = u[half:].sum()
    out = np.full((n, d), np.nan)
    if n < 2 * half:
        return out
    # windows of 2*half frames starting at s cover t-half..t+half-1 with t = s + half
    from numpy.lib.stride_tricks import sliding_window_view

    for j in range(d):
        w = sliding_window_view(z[:, j], 2 * half)  # (n - 2h + 1, 2h)
        out[half:n - half + 1, j] = (w @ u) / norm
    return out


def _frame_rate(index: pd.Index) -> float:
    t = np.asarray(index, dtype=np.float64)
    if t.size < 2:
        raise WorkFailed("feature frame has fewer than 2 frames; cannot look for change points")
    dt = np.diff(t)
    if not np.all(dt > 0):
        raise WorkFailed("feature frame index (time) is not strictly increasing")
    return 1.0 / float(np.median(dt))


def novelty_curve(
    features: pd.DataFrame,
    *,
    columns: list[str] | None = None,
    half_width_s: float = 5.0,
    spans: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Per frame: ``strength`` (Euclidean norm of the step, SD units) and the step per feature.

    The step at frame t compares frames ``t - L .. t - 1`` with ``t .. t + L - 1`` (``L`` frames
    = ``half_width_s``), i.e. a change between frames t - 1 and t.

    Parameters
    ----------
    features : DataFrame
        Indexed by frame-centre time (s), one column per feature.
    columns : list of str, optional
        Features to use. Default: one column per aspect -- loudness, tempo, onset rate,
        brightness, noisiness, key strength, harmonic change, roughness -- as found by
        :func:`stimkit.stats.roles.change_columns`, so that a family of many columns (twelve
        chroma bins, three loudness measures) does not outweigh the rest; every numeric column
        when none of those is present.
    half_width_s : float
        Kernel half width in seconds (frames before and after compared).
    spans : DataFrame, optional
        ``start``, ``end`` (seconds, same clock as the index): novelty is evaluated inside each
        span separately (the kernel never straddles a span edge); default the whole frame.

    Returns
    -------
    DataFrame
        Same index; column ``strength`` then ``step:<feature>`` per feature; NaN where the kernel
        does not fit.
    """
    rate = _frame_rate(features.index)
    if columns is None:
        columns = change_columns(features) or None
    z = standardize_features(features, columns=columns)
    half = max(1, int(round(half_width_s * rate)))
    t = np.asarray(features.index, dtype=np.float64)
    steps = np.full((len(t), z.shape[1]), np.nan)
    if spans is None:
        ranges = [(0, len(t))]
    else:
        ranges = []
        for s, e in zip(spans["start"].to_numpy(float), spans["end"].to_numpy(float)):
            i0, i1 = np.searchsorted(t, s, "left"), np.searchsorted(t, e, "right")
            if i1 > i0:
                ranges.append((int(i0), int(i1)))
    zv = z.to_numpy()
    for i0, i1 in ranges:
        steps[i0:i1] = _step_vectors(zv[i0:i1], half)
    strength = np.sqrt(np.sum(steps ** 2, axis=1)) if z.shape[1] else np.full(len(t), np.nan)
    out = pd.DataFrame({"strength": strength}, index=features.index)
    for j, c in enumerate(z.columns):
        out[f"step:{c}"] = steps[:, j]
    return out


def change_points(
    features: pd.DataFrame,
    *,
    columns: list[str] | None = None,
    half_width_s: float = 5.0,
    min_strength_sd: float = 1.0,
    min_distance_s: float = 5.0,
    spans: pd.DataFrame | None = None,
    share_of_max: float = 0.5,
) -> pd.DataFrame:
    """Change points of the feature frame (peaks of Foote novelty), in recording time.

    Parameters
    ----------
    features, columns, half_width_s, spans
        As in :func:`novelty_curve`.
    min_strength_sd : float
        Minimum ``strength`` (norm of the before/after step in SD units) of a change point.
    min_distance_s : float
        Minimum time between two change points.
    share_of_max : float
        A feature is listed as "changed" when its ``|step|`` is at least this share of the
        largest ``|step|`` at that point.

    Returns
    -------
    DataFrame
        One row per change point, sorted by time: ``recording`` (s; the midpoint between the last
        frame centre before the change and the first after it), ``strength``
        (SD units), ``features`` (comma-separated, largest change first), ``changes``
        (``name:+1.23;...``, signed steps in SD units, same order) -- the material for
        ``feature_change`` events (``label`` = ``features``).
    """
    nov = novelty_curve(features, columns=columns, half_width_s=half_width_s, spans=spans)
    rate = _frame_rate(features.index)
    s = nov["strength"].to_numpy()
    filled = np.where(np.isfinite(s), s, -1.0)
    # pad so that a maximum at the first/last valid frame can still be found
    peaks, _ = find_peaks(np.concatenate([[-1.0], filled, [-1.0]]), height=min_strength_sd,
                          distance=max(1, int(round(min_distance_s * rate))))
    peaks = peaks - 1
    names = [c[5:] for c in nov.columns if c.startswith("step:")]
    stepm = nov[[f"step:{c}" for c in names]].to_numpy()
    rows = []
    t = np.asarray(features.index, dtype=np.float64)
    for p in peaks:
        st = stepm[p]
        order = np.argsort(-np.abs(st), kind="stable")
        top = [k for k in order if abs(st[k]) >= share_of_max * abs(st[order[0]])]
        rows.append({
            "recording": float(0.5 * (t[p - 1] + t[p])) if p > 0 else float(t[p]),
            "strength": float(s[p]),
            "features": ",".join(names[k] for k in top),
            "changes": ";".join(f"{names[k]}:{st[k]:+.2f}" for k in top),
        })
    return pd.DataFrame(rows, columns=["recording", "strength", "features", "changes"])
