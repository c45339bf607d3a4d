"""Feature means before and after each event, and per-piece summaries of the features.

What it computes
----------------
- :func:`event_windows`: for every event, the mean of each feature over a window before it and
  a window after it, and their difference (after minus before) -- the pre/post contrast of
  event-related physiology (common practice: 5 s before / 5 s after, the defaults here).
- :func:`window_summary`: per event kind and feature, the number of events and the mean and
  SD of the after-minus-before differences.
- :func:`piece_summary`: per piece its duration, mean / SD of loudness, loudness range (LRA,
  EBU Tech 3342 on the short-term loudness column unless given), tempo mean / SD / range and
  mean onset rate.

Conventions
-----------
- The feature frame is indexed by frame-centre time in seconds on the same clock as the event
  column used (``time_column``, default ``recording``). A frame belongs to the pre window when
  its centre lies in ``[t - pre_s, t)`` and to the post window when in ``[t, t + post_s)``.
- Means skip non-finite values (e.g. -inf LUFS in digital silence, tempo undefined in a pause);
  a window with no finite value gives NaN.
- Loudness means are arithmetic means of the dB (LUFS) values above the -70 LUFS absolute
  gate of ITU-R BS.1770-4 (frames of silence, often floored at -120, are left out); SD
  likewise, in LU.

References
----------
EBU Tech 3342 (2016), Loudness range: a measure to supplement EBU R 128 loudness normalization
(short-term loudness, absolute gate -70 LUFS, relative gate -20 LU, 10th to 95th percentile).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .roles import pick_column

__all__ = ["event_windows", "window_summary", "piece_summary", "loudness_range"]


def _numeric_columns(features: pd.DataFrame, columns) -> list[str]:
    if columns is not None:
        return [c for c in columns if c in features.columns]
    return [c for c in features.columns if pd.api.types.is_numeric_dtype(features[c])
            and not pd.api.types.is_bool_dtype(features[c])]


def _window_means(t: np.ndarray, values: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """Mean of finite values with lo <= t < hi per window, via cumulative sums (O(N + M))."""
    fin = np.isfinite(values)
    cs = np.concatenate([[0.0], np.cumsum(np.where(fin, values, 0.0))])
    cn = np.concatenate([[0], np.cumsum(fin)])
    i0 = np.searchsorted(t, lo, "left")
    i1 = np.searchsorted(t, hi, "left")
    n = cn[i1] - cn[i0]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, (cs[i1] - cs[i0]) / np.maximum(n, 1), np.nan)
    return mean, n


def event_windows(
    features: pd.DataFrame,
    events: pd.DataFrame,
    *,
    time_column: str = "recording",
    pre_s: float = 5.0,
    post_s: float = 5.0,
    columns: list[str] | None = None,
    spans: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Pre/post feature means around each event (long format: one row per event x feature).

    Parameters
    ----------
    features : DataFrame
        Indexed by frame-centre time (s), one column per feature.
    events : DataFrame
        The event table; events whose ``time_column`` is missing are skipped.
    time_column : str
        Event column on the clock of the feature index (default ``recording``).
    pre_s, post_s : float
        Window lengths before and after the event (default 5 s each, common practice).
    columns : list of str, optional
        Features to use (default every numeric column).
    spans : DataFrame, optional
        ``start``, ``end`` of the pieces (s, same clock): the windows of an event inside a piece
        are cut at that piece's edges, so a window never reaches into the applause or the
        silence around it (an event at a piece's first note then has no pre window: NaN).
        Events outside every span keep full windows.

    Returns
    -------
    DataFrame
        Columns ``event`` (row position in ``events``), ``trial_type``, ``piece``, ``label``,
        ``time`` (s), ``feature``, ``pre_mean``, ``post_mean``, ``difference`` (post - pre),
        ``pre_n``, ``post_n`` (finite frames used); rows in event order, features in column
        order.
    """
    cols = _numeric_columns(features, columns)
    t = np.asarray(features.index, dtype=np.float64)
    et = pd.to_numeric(events[time_column], errors="coerce").to_numpy(np.float64) \
        if time_column in events.columns else np.full(len(events), np.nan)
    keep = np.flatnonzero(np.isfinite(et))
    te = et[keep]
    parts = []
    meta = {}
    for c in ("trial_type", "piece", "label"):
        meta[c] = events[c].to_numpy(object)[keep] if c in events.columns else np.full(len(keep), None)
    lo_pre, hi_post = te - pre_s, te + post_s
    if spans is not None and len(spans):
        for s0, s1 in zip(spans["start"].to_numpy(np.float64), spans["end"].to_numpy(np.float64)):
            inside = (te >= s0) & (te <= s1)
            lo_pre = np.where(inside, np.maximum(lo_pre, s0), lo_pre)
            hi_post = np.where(inside, np.minimum(hi_post, s1), hi_post)
    for c in cols:
        v = pd.to_numeric(features[c], errors="coerce").to_numpy(np.float64)
        pre, npre = _window_means(t, v, lo_pre, te)
        post, npost = _window_means(t, v, te, hi_post)
        parts.append(pd.DataFrame({
            "event": keep, "trial_type": meta["trial_type"], "piece": meta["piece"],
            "label": meta["label"], "time": te, "feature": c, "pre_mean": pre, "post_mean": post,
            "difference": post - pre, "pre_n": npre.astype(np.int64), "post_n": npost.astype(np.int64),
            "_k": cols.index(c),
        }))
    columns_out = ["event", "trial_type", "piece", "label", "time", "feature", "pre_mean",
                   "post_mean", "difference", "pre_n", "post_n"]
    if not parts:
        return pd.DataFrame(columns=columns_out)
    out = pd.concat(parts, ignore_index=True)
    out = out.sort_values(["event", "_k"], kind="mergesort").reset_index(drop=True)
    return out[columns_out]


def window_summary(windows: pd.DataFrame) -> pd.DataFrame:
    """Per ``trial_type`` x ``feature``: ``n_events``, ``mean_difference``, ``sd_difference``.

    ``windows`` is the output of :func:`event_windows`; rows with a NaN difference are not
    counted. Kinds in first-seen order, features in their order; SD with ddof 1 (NaN for one
    event).
    """
    cols = ["trial_type", "feature", "n_events", "mean_difference", "sd_difference"]
    if windows is None or not len(windows):
        return pd.DataFrame(columns=cols)
    w = windows[np.isfinite(windows["difference"].to_numpy(np.float64))]
    tt = w["trial_type"].map(lambda v: "n/a" if pd.isna(v) else str(v)).to_numpy()
    kinds = list(dict.fromkeys(tt))
    feats = list(dict.fromkeys(w["feature"]))
    ff = w["feature"].to_numpy()
    d = w["difference"].to_numpy(np.float64)
    rows = []
    for k in kinds:
        for f in feats:
            x = d[(tt == k) & (ff == f)]
            if x.size:
                rows.append({"trial_type": k, "feature": f, "n_events": int(x.size),
                             "mean_difference": float(x.mean()),
                             "sd_difference": float(x.std(ddof=1)) if x.size > 1 else float("nan")})
    return pd.DataFrame(rows, columns=cols)


def loudness_range(short_term_lufs: np.ndarray) -> float:
    """LRA in LU from short-term loudness values (EBU Tech 3342).

    Absolute gate -70 LUFS, relative gate 20 LU below the power mean of the absolute-gated
    values, then the 95th minus the 10th percentile. Tech 3342 asks for short-term values at
    10 Hz or more; at lower rates the result is an approximation. NaN when nothing passes.
    """
    v = np.asarray(short_term_lufs, dtype=np.float64)
    v = v[np.isfinite(v) & (v > -70.0)]
    if v.size == 0:
        return float("nan")
    rel = 10.0 * np.log10(np.mean(10.0 ** (v / 10.0))) - 20.0
    v = v[v > rel]
    if v.size == 0:
        return float("nan")
    lo, hi = np.percentile(v, [10.0, 95.0])
    return float(hi - lo)


def _finite(x: np.ndarray) -> np.ndarray:
    return x[np.isfinite(x)]


def piece_summary(
    features: pd.DataFrame,
    pieces: pd.DataFrame,
    *,
    loudness_column: str | None = None,
    tempo_column: str | None = None,
    onset_rate_column: str | None = None,
    lra_lu: dict[str, float] | None = None,
) -> pd.DataFrame:
    """Per piece: duration and the first numbers asked about loudness, tempo and onsets.

    Parameters
    ----------
    features : DataFrame
        Indexed by frame-centre time (s) on the clock of ``pieces``.
    pieces : DataFrame
        ``piece``, ``start``, ``end`` (s); an ``lra_lu`` column, when present, is used as given.
    loudness_column, tempo_column, onset_rate_column : str, optional
        Override the columns picked by :func:`stimkit.stats.roles.pick_column`.
    lra_lu : dict, optional
        Piece -> LRA (LU) measured elsewhere (e.g. on the full-rate signal); otherwise LRA is
        computed from the short-term loudness column when there is one.

    Returns
    -------
    DataFrame
        ``piece``, ``start``, ``end``, ``duration_s``, ``loudness_mean``, ``loudness_sd``,
        ``lra_lu``, ``tempo_mean_bpm``, ``tempo_sd_bpm``, ``tempo_min_bpm``, ``tempo_max_bpm``,
        ``onset_rate_mean_hz``; plus ``loudness_column`` naming the loudness feature used. A
        number whose feature is absent is NaN.
    """
    lc = pick_column(features, "loudness", override=loudness_column)
    stc = pick_column(features, "loudness_short_term")
    tc = pick_column(features, "tempo", override=tempo_column)
    oc = pick_column(features, "onset_rate", override=onset_rate_column)
    t = np.asarray(features.index, dtype=np.float64)

    def seg(col, s, e):
        if col is None:
            return np.array([])
        m = (t >= s) & (t < e)
        return _finite(pd.to_numeric(features[col], errors="coerce").to_numpy(np.float64)[m])

    rows = []
    for _, r in pieces.iterrows():
        s, e = float(r["start"]), float(r["end"])
        name = r["piece"]
        loud, tempo, ons = seg(lc, s, e), seg(tc, s, e), seg(oc, s, e)
        loud = loud[loud > -70.0]  # BS.1770 absolute gate: silence floors do not count
        if lra_lu is not None and name in lra_lu:
            lra = float(lra_lu[name])
        elif "lra_lu" in pieces.columns and pd.notna(r.get("lra_lu")):
            lra = float(r["lra_lu"])
        elif stc is not None:
            lra = loudness_range(seg(stc, s, e))
        else:
            lra = float("nan")
        nan = float("nan")
        rows.append({
            "piece": name, "start": s, "end": e, "duration_s": e - s,
            "loudness_mean": float(loud.mean()) if loud.size else nan,
            "loudness_sd": float(loud.std(ddof=1)) if loud.size > 1 else nan,
            "lra_lu": lra,
            "tempo_mean_bpm": float(tempo.mean()) if tempo.size else nan,
            "tempo_sd_bpm": float(tempo.std(ddof=1)) if tempo.size > 1 else nan,
            "tempo_min_bpm": float(tempo.min()) if tempo.size else nan,
            "tempo_max_bpm": float(tempo.max()) if tempo.size else nan,
            "onset_rate_mean_hz": float(ons.mean()) if ons.size else nan,
            "loudness_column": lc,
        })
    return pd.DataFrame(rows, columns=[
        "piece", "start", "end", "duration_s", "loudness_mean", "loudness_sd", "lra_lu",
        "tempo_mean_bpm", "tempo_sd_bpm", "tempo_min_bpm", "tempo_max_bpm", "onset_rate_mean_hz",
        "loudness_column"])
