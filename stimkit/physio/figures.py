"""The two pictures of a relate run: the boundary forest plot and the coincidence band plot.

- :func:`forest_figure` -- per participant x series, one panel per window size: one row per
  tested boundary in time order ("m.<measure> <trial_type>: <label>"), the difference after -
  before with its 95 % interval, a filled marker where significant (BH on the calibrated p),
  colour by direction, a line at 0 and a grey band for the 5-95 % range of the differences at
  the pseudo-boundaries (chance), and a caption with the share of significant boundaries
  against the 95th percentile of its null.
- :func:`coincidence_figure` -- per participant x series, small multiples per feature set (the
  union first, then each feature): x = h (s), y = success rate; grey 5-95 % null band, dashed
  null median, solid observed line with markers, dotted analytic p_hit; shaded spans where the
  observed rate exceeds the 95th percentile; the subtitle gives n_P, n_M, T, the null, R and
  p_global.

Both return PNG bytes from the Agg backend without a software text chunk, so equal inputs give
equal bytes.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pandas as pd

__all__ = ["forest_figure", "coincidence_figure", "png_bytes"]

UP, DOWN, BAND = "#b5472d", "#2c6e9b", "#d9dde2"


def png_bytes(fig, *, dpi: int = 110) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()


def _label(r) -> str:
    m = r.measure
    ms = "" if m is None or (isinstance(m, float) and math.isnan(m)) else f"m.{int(float(m))} "
    lab = "" if r.label is None or (isinstance(r.label, float) and math.isnan(r.label)) else f": {r.label}"
    text = f"{ms}{r.trial_type}{lab}"
    return text if len(text) <= 38 else text[:37] + "…"


def forest_figure(tests: pd.DataFrame, summary: pd.DataFrame, *, title: str, unit: str = "ms",
                  max_rows: int = 120) -> bytes:
    """Forest plot PNG (module notes) for one participant x series."""
    from matplotlib.figure import Figure

    ok = tests[tests["status"] == "ok"]
    sizes = list(dict.fromkeys(tests["N"])) or [0]
    nrows = max([int((ok["N"] == s).sum()) for s in sizes] + [1])
    nrows = min(nrows, max_rows)
    label_in, panel_in, row_in = 2.5, 3.6, 0.19
    top_in, bottom_in = 0.85, 1.25
    plot_h = max(row_in * nrows, 1.2)
    W = (label_in + panel_in) * len(sizes) + 0.3
    H = top_in + plot_h + bottom_in
    fig = Figure(figsize=(W, H))
    wu = tests["window_unit"].iloc[0] if len(tests) else "beats"
    for k, size in enumerate(sizes):
        x0 = (k * (label_in + panel_in) + label_in) / W
        ax = fig.add_axes([x0, bottom_in / H, panel_in / W, plot_h / H])
        d = ok[ok["N"] == size].sort_values("onset", kind="mergesort").head(max_rows)
        y = np.arange(len(d))[::-1]
        for yi, r in zip(y, d.itertuples(index=False)):
            s = summary[(summary["N"] == size) & (summary["trial_type"] == r.trial_type)]
            if len(s) and np.isfinite(s["chance_delta_q05"].iloc[0]):
                ax.plot([s["chance_delta_q05"].iloc[0], s["chance_delta_q95"].iloc[0]], [yi, yi],
                        color=BAND, lw=6, solid_capstyle="butt", zorder=1)
            col = UP if r.delta > 0 else DOWN
            if np.isfinite(r.ci_low):
                ax.plot([r.ci_low, r.ci_high], [yi, yi], color=col, lw=1.1, zorder=2)
            sig = r.significant is True or r.significant == "true"
            ax.plot([r.delta], [yi], "o", ms=4.5, mec=col, mfc=col if sig else "white", zorder=3)
        ax.axvline(0, color="#444", lw=0.8)
        ax.set_yticks(y)
        ax.set_yticklabels([_label(r) for r in d.itertuples(index=False)], fontsize=6.5)
        ax.set_ylim(-0.8, max(len(d), 1) - 0.2)
        ax.set_xlabel(f"after - before ({unit})", fontsize=7.5)
        ax.tick_params(axis="x", labelsize=7)
        ax.set_title(f"window {size:g} {wu}", fontsize=8.5)
        if not len(d):
            ax.text(0.5, 0.5, "no boundary window fits inside the pieces", ha="center", va="center",
                    transform=ax.transAxes, fontsize=8, color="#666")
        caps = [f"{r.trial_type}: {r.n_significant}/{r.B} significant; share p<.05 {r.s_obs:.2f} vs "
                f"chance q95 {r.null_q95:.2f}" for r in summary[summary["N"] == size].itertuples(index=False)
                if r.B]
        fig.text((k * (label_in + panel_in) + 0.15) / W, (bottom_in - 0.45) / H, "\n".join(caps[:8]),
                 fontsize=6, va="top", color="#333")
    fig.suptitle(title + "\nfilled = significant (BH on calibrated p); grey = 5-95 % of chance "
                 "(pseudo-boundaries); red = after larger, blue = after smaller", fontsize=8)
    return png_bytes(fig)


def coincidence_figure(curve: pd.DataFrame, summary: pd.DataFrame, *, title: str, null_method: str = "iaaft",
                       reference: str = "physio", max_panels: int = 12) -> bytes | None:
    """Band-and-line PNG (module notes), or ``None`` when nothing was inferred."""
    from matplotlib.figure import Figure

    c = curve[(curve["reference"] == reference) & (curve["null_method"] == null_method)]
    if not len(c):
        c = curve[(curve["reference"] == reference)]
    if not len(c):
        return None
    sets = list(dict.fromkeys(c["feature_set"]))
    order = (["all"] if "all" in sets else []) + [s for s in sets if s != "all" and "+" not in s]
    order = order[:max_panels]
    n = len(order)
    cols = min(3, n)
    rows = int(math.ceil(n / cols))
    fig = Figure(figsize=(3.6 * cols + 0.4, 2.6 * rows + 0.9))
    axes = fig.subplots(rows, cols, squeeze=False)
    for k, ax in enumerate(axes.ravel()):
        if k >= n:
            ax.set_visible(False)
            continue
        name = order[k]
        d = c[c["feature_set"] == name]
        h = d["h"].to_numpy(float)
        obs = d["rate_obs"].to_numpy(float)
        if np.isfinite(d["q05"]).any():
            ax.fill_between(h, d["q05"], d["q95"], color=BAND, lw=0, label="null 5-95 %")
            ax.plot(h, d["q50"], "--", color="#777", lw=0.9, label="null median")
            above = obs > d["q95"].to_numpy(float)
            for i in np.flatnonzero(above):
                ax.axvspan(h[i] - 0.25, h[i] + 0.25, color="#e8b04a", alpha=0.3, lw=0, zorder=1.5)
        ax.plot(h, d["p_hit"], ":", color="#555", lw=1.0, label="analytic p_hit")
        ax.plot(h, obs, "-o", color="#1d2a36", ms=2.5, lw=1.2, label="observed")
        s = summary[(summary["feature_set"] == name) & (summary["reference"] == reference) &
                    (summary["null_method"] == d["null_method"].iloc[0])]
        pg = s["p_global"].iloc[0] if len(s) else np.nan
        r0 = d.iloc[0]
        ax.set_title(f"{name}\nn_P {r0.n_P}, n_M {r0.n_M}, T {r0['T']:.0f} s, {r0.null_method} R {r0.R}, "
                     f"p_global {'n/a' if not np.isfinite(pg) else f'{pg:.3f}'}", fontsize=7)
        ax.set_ylim(0, 1.02)
        ax.set_xlim(0, float(h.max()) + 0.25)
        ax.tick_params(labelsize=7)
        if k % cols == 0:
            ax.set_ylabel("share of physiological CPs\nwith a music CP within h", fontsize=7)
        if k >= n - cols:
            ax.set_xlabel("h (s)", fontsize=7)
        if k == 0:
            ax.legend(fontsize=6, loc="lower right", frameon=False)
    fig.suptitle(title + "\nshaded: observed above the null's 95th percentile (descriptive unless "
                 "p_global < 0.05)", fontsize=8.5)
    fig.subplots_adjust(left=0.09, right=0.98, top=1 - 0.8 / (2.6 * rows + 0.9), bottom=0.45 / (2.6 * rows + 0.9) + 0.04,
                        hspace=0.75, wspace=0.3)
    return png_bytes(fig)
