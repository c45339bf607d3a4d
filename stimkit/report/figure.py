"""The overview figure: the session's features in stacked lanes against time, with every boundary.

What it draws
-------------
From top to bottom, each lane only when its data is there:

1. *marks* -- the labels of all boundaries, staggered on up to ``label_rows`` rows, placed in
   priority order (sections, keys, meters and tempi before dynamics, detected changes last);
   a label that finds no free row is left out (counted in the lane title), but its line is
   always drawn in every lane;
2. *waveform envelope* -- min/max of the signal per display column;
3. *loudness* -- short-term loudness (LUFS), falling back to momentary loudness, then RMS dBFS;
4. *tempo* -- local tempo (BPM);
5. *tonality* -- key ambiguity ``1 - key strength`` when key strength is there: key strength
   (the best correlation of the chroma with the Krumhansl-Kessler key profiles; Krumhansl 1990)
   is a slow, bounded measure of how firmly a key is established; its loss is related to, but
   not the same as, the tonal component of published tension models (Lerdahl & Krumhansl 2007;
   Farbood 2012), so the lane is not called tension. Fallbacks: harmonic
   change (Harte, Sandler & Gasser 2006; a rate of change rather than a level, so peakier) and
   sensory roughness (Sethares 1993; a sensory, not tonal, quantity);
6. *onset rate* (onsets per second);
7. *sync residuals* (ms) at the sync marks, when a sync fit is given.

Piece spans are tinted and named across all lanes; low-confidence regions are hatched.

Conventions
-----------
All times are seconds on one clock -- the feature index (frame centres), the envelope times, the
piece spans, the low-confidence regions and the event column ``time_column`` must agree; the
axis is labelled with ``clock_label``. Output is deterministic: the figure is built under
matplotlib's default style with fixed sizes, and :func:`figure_png` renders with the Agg
backend at a fixed dpi and without the software-version PNG text chunk, so equal inputs give
byte-identical PNG files.

References
----------
Krumhansl, C. L. (1990). Cognitive Foundations of Musical Pitch. Oxford University Press.
Lerdahl, F., & Krumhansl, C. L. (2007). Modeling tonal tension. Music Perception, 24(4), 329-366.
Farbood, M. M. (2012). A parametric, temporal model of musical tension. Music Perception, 29(4).
Harte, C., Sandler, M., & Gasser, M. (2006). Detecting harmonic change in musical audio. ACM
Workshop on Audio and Music Computing Multimedia.
Sethares, W. A. (1993). Local consonance and the relationship between timbre and scale. JASA 94(3).
"""

from __future__ import annotations

import io

import matplotlib
import matplotlib.style
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D

from ..export.tables import is_missing
from ..stats.roles import pick_column

__all__ = ["overview_figure", "figure_png", "LANE_ROLES", "MARK_COLOURS", "LABEL_PRIORITY"]

#: Lane -> (role in :data:`stimkit.stats.roles.ROLE_CANDIDATES`, lane title, fallback unit).
LANE_ROLES = (
    ("loudness", "loudness", "LUFS"),
    ("tempo", "tempo", "BPM"),
    ("tonality", "tonality", ""),
    ("onset_rate", "onset rate", "1/s"),
)

#: Line colour per trial_type (own palette; unknown kinds use the last entry).
MARK_COLOURS = {
    "dynamic": "#b5523b", "hairpin": "#d9865f", "accent": "#8c2d1c",
    "tempo": "#2f6f8f", "tempo_change": "#5fa3c2",
    "fermata": "#6b4f99", "pause": "#6b4f99", "silence": "#8a8a8a",
    "key": "#3d8b4f", "meter": "#7aa84a", "section": "#222222",
    "feature_change": "#c49a00", "sync": "#a0306e", "_other": "#555555",
}
_DPI = 100
_LEFT, _RIGHT = 0.07, 0.985
_LABEL_PT = 6.5
_LABEL_GAP_PX = 4.0
_PIECE_TINTS = ("#e8eef4", "#f4efe6")
_TRACE = "#1f3b57"
_RC = {
    "font.size": 8.0, "axes.titlesize": 8.0, "axes.labelsize": 8.0, "xtick.labelsize": 7.0,
    "ytick.labelsize": 7.0, "axes.titlelocation": "left", "axes.spines.top": False,
    "axes.spines.right": False, "path.simplify": True, "svg.hashsalt": "stimkit",
}


def _style():
    ctx = matplotlib.style.context("default")
    return ctx


def _as_time(df: pd.DataFrame | None, candidates) -> str | None:
    if df is None:
        return None
    for c in candidates:
        if c in df.columns:
            return c
    return None


def _mark_text(row) -> str:
    lab = row.get("label")
    tt = row.get("trial_type")
    text = str(lab) if not is_missing(lab) and str(lab) else str(tt)
    meas = row.get("measure")
    if not is_missing(meas):
        try:
            meas = int(meas) if float(meas) == int(float(meas)) else meas
        except (TypeError, ValueError):
            pass
        text = f"{meas}: {text}"
    return text if len(text) <= 22 else text[:21] + "\u2026"


#: Label priority when space is short: structure first, detected changes last.
LABEL_PRIORITY = ("section", "key", "meter", "tempo", "tempo_change", "pause", "fermata",
                  "dynamic", "hairpin", "accent", "sync", "silence", "feature_change")


def _place_labels(times: np.ndarray, widths: np.ndarray, rows: int, kinds=None) -> np.ndarray:
    """Row per label, -1 when no row has room (label thinned; its line is still drawn).

    Labels are placed in priority order (:data:`LABEL_PRIORITY`, then time), each in the
    lowest row where its extent ``[t, t + width)`` overlaps no label already placed.
    """
    n = times.size
    rank = {k: i for i, k in enumerate(LABEL_PRIORITY)}
    pr = np.array([rank.get(str(k), len(rank)) for k in kinds]) if kinds is not None else np.zeros(n)
    order = np.lexsort((times, pr))
    placed: list[list[tuple[float, float]]] = [[] for _ in range(rows)]
    out = np.full(n, -1, dtype=int)
    for i in order:
        a, b = times[i], times[i] + widths[i]
        for r in range(rows):
            if all(b <= lo or a >= hi for lo, hi in placed[r]):
                placed[r].append((a, b))
                out[i] = r
                break
    return out


def overview_figure(
    *,
    features: pd.DataFrame,
    units: dict[str, str],
    events: pd.DataFrame,
    pieces: pd.DataFrame | None = None,
    low_confidence: list[tuple[float, float]] | None = None,
    sync: pd.DataFrame | None = None,
    envelope: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
    time_column: str = "recording",
    clock_label: str = "recording time (s)",
    title: str | None = None,
    width_in: float = 12.0,
    label_rows: int = 8,
    columns: dict[str, str] | None = None,
) -> Figure:
    """Stacked feature lanes with every boundary marked (see the module notes).

    Parameters
    ----------
    features : DataFrame
        Indexed by frame-centre time (s); lanes pick their columns by role
        (:data:`LANE_ROLES`, :func:`stimkit.stats.roles.pick_column`); a lane whose column is
        absent is skipped.
    units : dict
        Column -> unit, for the lane axis labels.
    events : DataFrame
        Event table; rows with a finite ``time_column`` are drawn as vertical lines (``piece``
        rows as spans when ``pieces`` is not given).
    pieces : DataFrame, optional
        ``piece``, ``start``, ``end`` (s) on the same clock.
    low_confidence : list of (start, end), optional
        Regions where the alignment is doubtful, hatched.
    sync : DataFrame, optional
        Sync marks: a time column (``recording``, ``time_s``, ``mark_s`` or ``onset``) and
        ``residual_ms``; drawn as a small lane.
    envelope : (t, lo, hi), optional
        Waveform envelope: times (s) and min/max sample values.
    time_column : str
        Event column on the figure's clock.
    clock_label : str
        Label of the time axis.
    title : str, optional
        Figure title.
    width_in : float
        Figure width in inches (height follows the number of lanes).
    label_rows : int
        Most rows for boundary labels; the lane uses only the rows needed, and a label that
        finds no free row is left out (its line stays).
    columns : dict, optional
        Role -> column name overrides (e.g. ``{"tonality": "roughness"}``).

    Returns
    -------
    matplotlib.figure.Figure
        Not attached to pyplot; render it with :func:`figure_png`.
    """
    columns = columns or {}
    with _style(), matplotlib.rc_context(_RC):
        return _build(features, units, events, pieces, low_confidence or [], sync, envelope,
                      time_column, clock_label, title, width_in, label_rows, columns)


def _build(features, units, events, pieces, low_conf, sync, envelope, time_column, clock_label,
           title, width_in, label_rows, columns):
    lanes = []  # (kind, payload)
    lanes.append(("marks", None))
    if envelope is not None and len(envelope[0]):
        lanes.append(("envelope", envelope))
    feat_t = np.asarray(features.index, dtype=np.float64) if features is not None else np.array([])
    for role, name, unit in LANE_ROLES:
        col = pick_column(features, role, override=columns.get(role)) if features is not None else None
        if col is None:
            continue
        y = pd.to_numeric(features[col], errors="coerce").to_numpy(np.float64)
        if not np.isfinite(y).any():
            continue
        lane_unit = units.get(col, unit)
        label = col
        if role == "tonality" and col == "key_strength":
            y = 1.0 - y
            label = "key ambiguity (1 - key_strength)"
            lane_unit = ""
        if role == "loudness":
            y = np.where(np.isfinite(y) & (y > -70.0), y, np.nan)  # silence below the -70 gate
        lanes.append(("trace", (name, label, lane_unit, y)))
    sync_t = _as_time(sync, ("recording", "time_s", "mark_s", "onset"))
    if sync is not None and sync_t is not None and "residual_ms" in sync.columns and len(sync):
        lanes.append(("sync", sync))

    # events to mark
    ev = events.copy() if events is not None else pd.DataFrame()
    if len(ev) and time_column in ev.columns:
        ev["_t"] = pd.to_numeric(ev[time_column], errors="coerce")
        ev = ev[np.isfinite(ev["_t"].to_numpy(np.float64))]
    else:
        ev = pd.DataFrame(columns=["_t", "trial_type"])
    if pieces is None and len(ev) and "trial_type" in ev.columns:
        pr = ev[ev["trial_type"] == "piece"]
        if len(pr):
            d = pd.to_numeric(pr.get("duration"), errors="coerce").fillna(0.0)
            pieces = pd.DataFrame({"piece": pr.get("piece", pr.get("label")), "start": pr["_t"],
                                   "end": pr["_t"] + d})
    marks = ev[ev["trial_type"] != "piece"] if "trial_type" in ev.columns else ev

    # time range
    spans = []
    for arr in (feat_t, np.asarray(marks["_t"], dtype=np.float64)):
        if arr.size:
            spans += [np.nanmin(arr), np.nanmax(arr)]
    if envelope is not None and len(envelope[0]):
        spans += [float(np.min(envelope[0])), float(np.max(envelope[0]))]
    if pieces is not None and len(pieces):
        spans += [float(pieces["start"].min()), float(pieces["end"].max())]
    x0, x1 = (min(spans), max(spans)) if spans else (0.0, 1.0)
    if x1 <= x0:
        x1 = x0 + 1.0
    pad = 0.01 * (x1 - x0)
    x0, x1 = x0 - pad, x1 + pad

    # one line collection per kind and lane (fast for thousands of marks), kinds in a fixed order
    kinds = marks["trial_type"].map(str).to_numpy() if "trial_type" in marks.columns else \
        np.full(len(marks), "_other")
    mt = marks["_t"].to_numpy(np.float64)
    mark_groups = [(k, mt[kinds == k]) for k in sorted(set(kinds))]

    # place the labels first (measured with the Agg renderer at the output dpi; text and axes
    # scale together at any other dpi), so the marks lane gets only the rows it needs
    texts = [_mark_text(r) for _, r in marks.iterrows()]
    axes_px = width_in * (_RIGHT - _LEFT) * _DPI
    measure = RendererAgg(8, 8, _DPI)
    prop = FontProperties(size=_LABEL_PT)
    widths = np.array([(measure.get_text_width_height_descent(" " + s, prop, ismath=False)[0]
                        + _LABEL_GAP_PX) * (x1 - x0) / axes_px for s in texts])
    rowsel = _place_labels(mt, widths, max(1, label_rows), kinds)
    rows = int(max(2, rowsel.max() + 1)) if rowsel.size else 2

    heights = {"marks": 0.17 * rows + 0.45, "envelope": 0.9, "trace": 1.05, "sync": 0.7}
    hr = [heights[k] for k, _ in lanes]
    top_in, bottom_in = (0.45 if title else 0.2), (0.9 if mark_groups else 0.5)
    total = sum(hr) + 0.35 * (len(lanes) - 1) + top_in + bottom_in
    fig = Figure(figsize=(width_in, total), dpi=_DPI)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(len(lanes), 1, height_ratios=hr, hspace=0.35 * len(lanes) / sum(hr),
                          left=_LEFT, right=_RIGHT, top=1 - top_in / total, bottom=bottom_in / total)
    axes = []
    for i, (kind, payload) in enumerate(lanes):
        ax = fig.add_subplot(gs[i, 0], sharex=axes[0] if axes else None)
        axes.append(ax)
        ax.set_xlim(x0, x1)
        # backgrounds: pieces and low confidence
        if pieces is not None:
            for k, (_, p) in enumerate(pieces.reset_index(drop=True).iterrows()):
                ax.axvspan(float(p["start"]), float(p["end"]), color=_PIECE_TINTS[k % 2], zorder=0, lw=0)
        for s, e in low_conf:
            ax.axvspan(float(s), float(e), facecolor="none", edgecolor="#9a9a9a", hatch="////",
                       lw=0, zorder=0.5)
        for tt, times in mark_groups:
            colour = MARK_COLOURS.get(tt, MARK_COLOURS["_other"])
            ls = (0, (3, 2)) if tt == "feature_change" else "solid"
            ax.vlines(times, 0.0, 1.0, transform=ax.get_xaxis_transform(), colors=colour,
                      linewidths=0.6, linestyles=ls, alpha=0.8, zorder=1, label=f"_marks:{tt}")
        if kind == "marks":
            _draw_marks(ax, mt, kinds, texts, rowsel, rows, pieces, x0)
        elif kind == "envelope":
            t, lo, hi = (np.asarray(a, dtype=np.float64) for a in payload)
            ax.fill_between(t, lo, hi, color=_TRACE, lw=0, alpha=0.85, zorder=2)
            ax.set_title("waveform envelope", pad=2)
            ax.set_ylabel("amplitude")
        elif kind == "trace":
            name, label, unit, y = payload
            ax.plot(feat_t, y, color=_TRACE, lw=0.9, zorder=2)
            ax.set_title(f"{name}  ({label})", pad=2)
            ax.set_ylabel(unit)
        elif kind == "sync":
            st = pd.to_numeric(payload[sync_t], errors="coerce").to_numpy(np.float64)
            r = pd.to_numeric(payload["residual_ms"], errors="coerce").to_numpy(np.float64)
            ax.axhline(0.0, color="#777777", lw=0.6)
            ax.vlines(st, 0.0, r, color=MARK_COLOURS["sync"], lw=1.2, zorder=2)
            ax.plot(st, r, "o", color=MARK_COLOURS["sync"], ms=3, zorder=3)
            lim = max(1.0, float(np.nanmax(np.abs(r))) * 1.3) if np.isfinite(r).any() else 1.0
            ax.set_ylim(-lim, lim)
            ax.set_title("sync residuals at the marks", pad=2)
            ax.set_ylabel("ms")
        if i < len(lanes) - 1:
            ax.tick_params(labelbottom=False)
    axes[-1].set_xlabel(clock_label)
    if title:
        fig.suptitle(title, x=_LEFT, ha="left", va="top", fontsize=9.5, fontweight="bold",
                     y=1 - 0.08 / total)
    if mark_groups:  # colour key of the boundary kinds, along the bottom edge
        handles = [Line2D([], [], color=MARK_COLOURS.get(k, MARK_COLOURS["_other"]), lw=1.2,
                          ls=(0, (3, 2)) if k == "feature_change" else "-") for k, _ in mark_groups]
        fig.legend(handles, [k for k, _ in mark_groups], loc="lower left",
                   bbox_to_anchor=(_LEFT, 0.05 / total), ncol=min(len(handles), 9),
                   frameon=False, fontsize=6.5, handlelength=1.6, columnspacing=1.2,
                   borderaxespad=0.0, title="boundary kinds", title_fontsize=6.5,
                   alignment="left")
    return fig


def _draw_marks(ax, times, kinds, texts, rowsel, rows, pieces, x0):
    ax.set_ylim(0, rows + 1)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    if pieces is not None:  # piece names on the top row
        for _, p in pieces.iterrows():
            ax.text(max(float(p["start"]), x0), rows + 0.5, f" {p['piece']}", va="center",
                    ha="left", fontsize=7.5, fontweight="bold", color="#333333", clip_on=True,
                    zorder=3)
    if not len(texts):
        ax.set_title("boundaries (none)", pad=2)
        return
    for t, s, r, tt in zip(times, texts, rowsel, kinds):
        if r < 0:
            continue
        ax.text(t, rows - 0.5 - r, " " + s, va="center", ha="left", fontsize=_LABEL_PT,
                color=MARK_COLOURS.get(str(tt), MARK_COLOURS["_other"]), clip_on=True, zorder=3)
    thinned = int(np.sum(rowsel < 0))
    note = f"boundaries ({len(texts)}" + (f"; {thinned} labels left out for space)" if thinned else ")")
    ax.set_title(note, pad=2)


def figure_png(fig: Figure, *, dpi: int = _DPI) -> bytes:
    """PNG bytes of ``fig`` (Agg, fixed dpi, no software-version text chunk): deterministic."""
    buf = io.BytesIO()
    with _style(), matplotlib.rc_context(_RC):
        FigureCanvasAgg(fig)
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()
