"""The report's pictures: a session overview that stays readable at concert length, and one
panel per piece with every boundary labelled.

What it draws
-------------
:func:`overview_figure` -- the whole session against clock time (``m:ss`` or ``h:mm:ss``), in
rows with their names on the left:

1. *pieces* -- each piece a block from its first note to its end, named, with its length;
   sync marks as ink crosses under the blocks;
2. *check by ear* -- where the alignment is unsure (low-confidence regions, drawn at least a
   few pixels wide so none is lost) and repeats skipped by the performers, in the palette's
   "listen here" colour; repeats taken are brackets over their repeated pass;
3. *boundaries* -- how many boundaries fall in each bin of time (stacked by family: loudness
   markings, tempo, form/key/metre, found in the sound, repeats), instead of one line each;
4. *loudness* -- short-term loudness (LUFS) as a filled ribbon above a -60 LUFS floor;
5. *tempo* -- the performed tempo (BPM) from the alignment, per piece.

:func:`piece_figure` -- one piece, zoomed to it: small lanes of loudness, tempo, tonal
tonality and onset rate (:data:`LANE_ROLES`) with bar numbers on a second axis, then the piece
written out in *systems* (rows of equal length, like lines of a score) in which every boundary
is a glyph (colour = family, shape = kind; :mod:`stimkit.report.palette`) with its label; labels
that would collide are stacked, never dropped. Each system carries the bar numbers on top
(``′`` marks a bar of a repeated pass) and the clock below.

Tonality lane: key ambiguity ``1 - key strength`` when key strength is there: key strength (the
best correlation of the chroma with the Krumhansl-Kessler key profiles; Krumhansl 1990) is a
slow, bounded measure of how firmly a key is established; its loss is related to, but not the
same as, the tonal component of published tension models (Lerdahl & Krumhansl 2007; Farbood
2012), so the lane is not called tension. Fallbacks: harmonic change (Harte, Sandler & Gasser
2006) and sensory roughness (Sethares 1993).

Conventions
-----------
All times are seconds on one clock -- the feature index (frame centres), the piece spans, the
regions and the event column ``time_column`` must agree; ``clock_label`` names that clock.
Output is deterministic: figures are built under matplotlib's default style with fixed sizes;
:func:`figure_png` renders with Agg at a fixed dpi without the software-version text chunk and
:func:`figure_svg` writes text as text, without date or creator, with fixed ids, so equal
inputs give byte-identical files. In the SVG every boundary glyph, piece block and check
region carries a ``<title>`` (shown when the pointer rests on it).

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

import html
import io
import math
import re

import matplotlib
import matplotlib.style
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.patches import FancyBboxPatch, Rectangle
from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter

from ..export.tables import is_missing
from ..stats.roles import pick_column
from . import palette as pal

__all__ = ["overview_figure", "piece_figure", "figure_png", "figure_svg", "clock_text", "LANE_ROLES",
           "LABEL_PRIORITY", "mark_text", "regions_of", "repeats_of"]

#: Lane -> (role in :data:`stimkit.stats.roles.ROLE_CANDIDATES`, lane title, fallback unit).
LANE_ROLES = (
    ("loudness", "loudness", "LUFS"),
    ("tempo", "tempo", "BPM"),
    ("tonality", "tonality", ""),
    ("onset_rate", "onset rate", "1/s"),
)

#: Order of the boundary kinds at one moment (structure first, detected changes last).
LABEL_PRIORITY = ("section", "key", "meter", "tempo", "tempo_change", "pause", "fermata",
                  "dynamic", "hairpin", "accent", "repeat", "sync", "silence", "feature_change")
#: Families stacked in the density row, bottom to top.
_DENSITY_FAMILIES = ("form", "tempo", "dynamics", "repeat", "audio")

_DPI = 100
_LEFT, _RIGHT = 0.085, 0.985
_LABEL_PT = 6.5
_RC = {
    "font.size": 8.0, "axes.titlesize": 8.0, "axes.labelsize": 7.5, "xtick.labelsize": 7.0,
    "ytick.labelsize": 6.5, "axes.titlelocation": "left", "axes.spines.top": False,
    "axes.spines.right": False, "path.simplify": True, "svg.hashsalt": "stimkit",
    "svg.fonttype": "none", "axes.edgecolor": pal.MUTED, "xtick.color": pal.MUTED,
    "ytick.color": pal.MUTED, "axes.labelcolor": pal.INK, "text.color": pal.INK,
}
_NICE_S = (1, 2, 5, 10, 15, 20, 30, 60, 120, 300, 600, 900, 1200, 1800, 3600, 7200)


def _style():
    return matplotlib.style.context("default")


# ---------------------------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------------------------
def clock_text(s: float, *, span_s: float | None = None, decimals: int = 0) -> str:
    """``m:ss`` (or ``h:mm:ss`` when the span reaches an hour); negative times get a sign."""
    if s is None or not math.isfinite(float(s)):
        return "n/a"
    s = float(s)
    sign = "-" if s < 0 else ""
    s = abs(s)
    scale = 10 ** decimals
    s = round(s * scale) / scale
    h, rest = divmod(s, 3600)
    m, sec = divmod(rest, 60)
    w = 2 + (decimals + 1 if decimals else 0)
    sec_txt = f"{sec:0{w}.{decimals}f}"
    if h or (span_s is not None and span_s >= 3600):
        return f"{sign}{int(h)}:{int(m):02d}:{sec_txt}"
    return f"{sign}{int(m)}:{sec_txt}"


def _step(span: float, most: int) -> float:
    for s in _NICE_S:
        if span / s <= most:
            return float(s)
    return float(_NICE_S[-1] * math.ceil(span / (_NICE_S[-1] * most)))


def _clock_axis(ax, x0: float, x1: float, *, most: int = 12, labels: bool = True):
    span = x1 - x0
    step = _step(span, most)
    ticks = np.arange(math.ceil(x0 / step) * step, x1 + 1e-9, step)
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    if labels:
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: clock_text(v, span_s=x1)))
    else:
        ax.xaxis.set_major_formatter(NullFormatter())


def _bins(t: np.ndarray, y: np.ndarray, x0: float, x1: float, n: int, how: str = "mean"):
    """Reduce a trace to about ``n`` display points (bin mean or max), NaN-aware."""
    ok = np.isfinite(t) & np.isfinite(y)
    t, y = t[ok], y[ok]
    if t.size <= n or t.size == 0:
        return t, y
    edges = np.linspace(x0, x1, n + 1)
    idx = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, n - 1)
    cnt = np.bincount(idx, minlength=n)
    if how == "max":
        out = np.full(n, -np.inf)
        np.maximum.at(out, idx, y)
    else:
        out = np.bincount(idx, weights=y, minlength=n) / np.maximum(cnt, 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    keep = cnt > 0
    return centres[keep], out[keep]


def mark_text(row, *, limit: int = 28) -> str:
    """The label of one boundary: what the marking says, else its kind."""
    lab = row.get("label")
    tt = row.get("trial_type")
    text = str(lab) if not is_missing(lab) and str(lab) else str(tt)
    if tt == "repeat":
        text = f"repeat {text}"
    elif tt == "feature_change" and not is_missing(lab):
        n = len([x for x in re.split(r"[,;]\s*", str(lab)) if x.strip()])
        text = f"sound changes ({n} feature{'s' if n != 1 else ''})"
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"


def _beat_text(beat) -> str:
    from .cuesheet import beat_text

    return beat_text(beat)


def regions_of(low_confidence) -> list[dict]:
    """Regions as dicts ``start``, ``end`` (and ``reason`` when known) from tuples or dicts."""
    out = []
    for r in low_confidence or []:
        if isinstance(r, dict):
            s, e = r.get("start"), r.get("end")
            reason = r.get("reason") or r.get("kind") or ""
        else:
            s, e = r[0], r[1]
            reason = r[2] if len(r) > 2 else ""
        try:
            s, e = float(s), float(e)
        except (TypeError, ValueError):
            continue
        if math.isfinite(s) and math.isfinite(e) and e >= s:
            out.append({"start": s, "end": e, "reason": str(reason or "")})
    return sorted(out, key=lambda d: (d["start"], d["end"]))


def repeats_of(events: pd.DataFrame, time_column: str) -> list[dict]:
    """Repeat rows of the event table (``trial_type == "repeat"``): ``start``, ``end``,
    ``taken`` (label ``taken``/``skipped``), ``measure``, ``piece``."""
    if events is None or not len(events) or "trial_type" not in events.columns:
        return []
    rows = events[events["trial_type"] == "repeat"]
    out = []
    for _, r in rows.iterrows():
        t = pd.to_numeric(pd.Series([r.get(time_column)]), errors="coerce").iloc[0]
        if not np.isfinite(t):
            continue
        d = pd.to_numeric(pd.Series([r.get("duration")]), errors="coerce").iloc[0]
        d = float(d) if np.isfinite(d) else 0.0
        lab = "" if is_missing(r.get("label")) else str(r.get("label"))
        out.append({"start": float(t), "end": float(t) + d, "taken": not lab.lower().startswith("skip"),
                    "label": lab, "measure": r.get("measure"), "piece": r.get("piece")})
    return out


def _events_on_clock(events, time_column):
    ev = events.copy() if events is not None else pd.DataFrame()
    if len(ev) and time_column in ev.columns:
        ev["_t"] = pd.to_numeric(ev[time_column], errors="coerce")
        ev = ev[np.isfinite(ev["_t"].to_numpy(np.float64))]
    else:
        ev = pd.DataFrame(columns=["_t", "trial_type"])
    if "trial_type" not in ev.columns:
        ev["trial_type"] = "_other"
    return ev


def _pieces_from_events(ev) -> pd.DataFrame | None:
    pr = ev[ev["trial_type"] == "piece"]
    if not len(pr):
        return None
    d = pd.to_numeric(pr.get("duration"), errors="coerce").fillna(0.0)
    return pd.DataFrame({"piece": pr.get("piece", pr.get("label")), "start": pr["_t"],
                         "end": pr["_t"] + d}).reset_index(drop=True)


def _lane_series(features, role, override, units, fallback_unit):
    col = pick_column(features, role, override=override) if features is not None else None
    if col is None:
        return None
    y = pd.to_numeric(features[col], errors="coerce").to_numpy(np.float64)
    if not np.isfinite(y).any():
        return None
    unit, label = units.get(col, fallback_unit), col
    if role == "tonality" and col == "key_strength":
        y, label, unit = 1.0 - y, "key ambiguity (1 - key_strength)", ""
    if role == "loudness":
        y = np.where(np.isfinite(y) & (y > -70.0), y, np.nan)  # silence below the -70 gate
    return y, label, unit


def _row_label(ax, text):
    ax.set_ylabel(text, rotation=0, ha="right", va="center", labelpad=6, fontsize=7.5)


# ---------------------------------------------------------------------------------------------
# the overview
# ---------------------------------------------------------------------------------------------
def overview_figure(
    *,
    features: pd.DataFrame,
    units: dict[str, str],
    events: pd.DataFrame,
    pieces: pd.DataFrame | None = None,
    low_confidence=None,
    sync: pd.DataFrame | None = None,
    envelope=None,
    time_column: str = "recording",
    clock_label: str = "recording time",
    title: str | None = None,
    width_in: float = 12.0,
    columns: dict[str, str] | None = None,
    tips: dict | None = None,
    **_ignored,
) -> Figure:
    """The session overview (see the module notes).

    Parameters
    ----------
    features : DataFrame
        Indexed by frame-centre time (s); the loudness and tempo rows pick their columns by role
        (:func:`stimkit.stats.roles.pick_column`).
    units : dict
        Column -> unit.
    events : DataFrame
        Event table; boundaries are counted per bin, ``repeat`` rows drawn in the check row.
    pieces : DataFrame, optional
        ``piece``, ``start``, ``end`` (s); from the ``piece`` events when not given.
    low_confidence : list, optional
        Regions where the alignment is unsure: ``(start, end)`` tuples or dicts with ``start``,
        ``end`` and ``reason``.
    sync : DataFrame, optional
        Sync marks: a time column (``onset``, ``recording``, ``time_s``) and ``residual_ms``.
    envelope : ignored
        Kept for callers of the earlier layout.
    time_column, clock_label : str
        The event column on the figure's clock, and that clock's name.
    title : str, optional
    width_in : float
    columns : dict, optional
        Role -> column overrides (e.g. ``{"tempo": "aligned_tempo_bpm"}``).
    tips : dict, optional
        Filled with SVG element id -> hover text (see :func:`figure_svg`).
    """
    columns = columns or {}
    with _style(), matplotlib.rc_context(_RC):
        return _overview(features, units, events, pieces, regions_of(low_confidence), sync,
                         time_column, clock_label, title, width_in, columns,
                         tips if tips is not None else {})


def _overview(features, units, events, pieces, regions, sync, time_column, clock_label, title,
              width_in, columns, tips):
    ev = _events_on_clock(events, time_column)
    if pieces is None:
        pieces = _pieces_from_events(ev)
    pieces = pieces.reset_index(drop=True) if pieces is not None else pd.DataFrame(columns=["piece", "start", "end"])
    marks = ev[~ev["trial_type"].isin(["piece", "repeat"])]
    reps = repeats_of(events, time_column)
    feat_t = np.asarray(features.index, dtype=np.float64) if features is not None else np.zeros(0)

    spans = [a for a in (feat_t, marks["_t"].to_numpy(np.float64)) if a.size]
    lo = [float(np.nanmin(a)) for a in spans] + ([float(pieces["start"].min())] if len(pieces) else [])
    hi = [float(np.nanmax(a)) for a in spans] + ([float(pieces["end"].max())] if len(pieces) else [])
    x0, x1 = (min(lo), max(hi)) if lo else (0.0, 1.0)
    if x1 <= x0:
        x1 = x0 + 1.0
    pad = 0.01 * (x1 - x0)
    x0, x1 = x0 - pad, x1 + pad
    span = x1 - x0

    loud = _lane_series(features, "loudness", columns.get("loudness"), units, "LUFS")
    tempo = _lane_series(features, "tempo", columns.get("tempo"), units, "BPM")
    rows = ["pieces", "check", "density"] + (["loudness"] if loud else []) + (["tempo"] if tempo else [])
    heights = {"pieces": 0.55, "check": 0.42, "density": 0.9, "loudness": 0.85, "tempo": 0.75}
    top_in, bottom_in, gap_in = (0.5 if title else 0.2), 0.85, 0.12
    total = sum(heights[r] for r in rows) + gap_in * (len(rows) - 1) + top_in + bottom_in
    fig = Figure(figsize=(width_in, total), dpi=_DPI)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(len(rows), 1, height_ratios=[heights[r] for r in rows],
                          hspace=gap_in * len(rows) / sum(heights[r] for r in rows),
                          left=_LEFT, right=_RIGHT, top=1 - top_in / total, bottom=bottom_in / total)
    axes = {}
    for i, r in enumerate(rows):
        ax = fig.add_subplot(gs[i, 0], sharex=axes.get("pieces"))
        ax.set_xlim(x0, x1)
        _clock_axis(ax, x0, x1)
        ax.tick_params(axis="x", length=2 if i < len(rows) - 1 else 3.5, labelbottom=(i == len(rows) - 1))
        ax.grid(axis="x", color="#e6e8ea", lw=0.6, zorder=0)
        axes[r] = ax
    min_w = span * 0.0025  # a region is drawn at least ~3 px wide

    # 1. pieces
    ax = axes["pieces"]
    ax.set_ylim(0, 1)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    _row_label(ax, "pieces")
    med = {}
    if "piece" in ev.columns and "confidence" in ev.columns:
        for name, g in ev[ev["trial_type"] != "piece"].groupby(ev["piece"].astype(str)):
            c = pd.to_numeric(g["confidence"], errors="coerce")
            med[name] = (int(len(g)), float(c.median()) if c.notna().any() else float("nan"))
    for k, p in pieces.iterrows():
        s, e = float(p["start"]), float(p["end"])
        box = FancyBboxPatch((s, 0.3), max(e - s, min_w), 0.6, boxstyle="round,pad=0,rounding_size=0.12",
                             mutation_aspect=1 / max(span, 1e-9) * width_in * 8, fc=pal.BLOCK, ec="none",
                             zorder=2, gid=f"piece-block-{k + 1}")
        box.set_url(f"#piece-{k + 1}")
        ax.add_patch(box)
        name = str(p["piece"])
        n, mc = med.get(name, (0, float("nan")))
        tips[f"piece-block-{k + 1}"] = (f"{name}: {clock_text(s, span_s=x1)} to {clock_text(e, span_s=x1)} "
                                        f"({clock_text(e - s)}), {n} boundaries"
                                        + (f", median confidence {mc:.2f}" if math.isfinite(mc) else "")
                                        + " (click: the piece's panel)")
        ax.text(s + 0.004 * span, 0.6, f"{k + 1}. {name}  {clock_text(e - s)}", ha="left", va="center",
                fontsize=7, color=pal.INK, clip_on=True, zorder=3)
    if sync is not None and len(sync):
        tcol = next((c for c in ("onset", "recording", "time_s", "mark_s") if c in sync.columns), None)
        if tcol is not None:
            st = pd.to_numeric(sync[tcol], errors="coerce").to_numpy(np.float64)
            ax.plot(st, np.full(st.size, 0.12), ls="none", marker=pal.GLYPH["sync"], ms=6, mew=1.2,
                    color=pal.INK, zorder=3)

    # 2. check by ear
    ax = axes["check"]
    ax.set_ylim(0, 1)
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    _row_label(ax, "check by ear")
    ax.axhline(0.5, color="#e6e8ea", lw=0.8, zorder=1)
    for j, r in enumerate(regions):
        w = max(r["end"] - r["start"], min_w)
        ax.add_patch(Rectangle((r["start"], 0.22), w, 0.56, fc=pal.CHECK, ec="none", zorder=3,
                               gid=f"check-{j + 1}"))
        tips[f"check-{j + 1}"] = (f"listen: {clock_text(r['start'], span_s=x1)} to "
                                  f"{clock_text(r['end'], span_s=x1)}"
                                  + (f" ({r['reason']})" if r["reason"] else " (low alignment confidence)"))
    for j, r in enumerate(reps):
        gid = f"repeat-{j + 1}"
        if r["taken"]:
            w = max(r["end"] - r["start"], min_w)
            ax.plot([r["start"], r["start"], r["start"] + w, r["start"] + w], [0.12, 0.05, 0.05, 0.12],
                    color=pal.FAMILY_COLOURS["repeat"], lw=1.2, zorder=3, gid=gid)
            if w > 0.04 * span:
                ax.text(r["start"], 0.14, " repeat", fontsize=6, va="bottom", ha="left",
                        color=pal.FAMILY_COLOURS["repeat"], zorder=4)
        else:
            ax.plot([r["start"]], [0.5], ls="none", marker="X", ms=7, color=pal.FAMILY_COLOURS["repeat"],
                    zorder=4, gid=gid)
        bar = "" if is_missing(r["measure"]) else f", bar {int(float(r['measure']))}"
        tips[gid] = (f"repeat {'taken' if r['taken'] else 'skipped'} at {clock_text(r['start'], span_s=x1)}"
                     f"{bar}" + (f" ({r['piece']})" if not is_missing(r["piece"]) else ""))
    n_skip = sum(1 for r in reps if not r["taken"])
    total_s = sum(r["end"] - r["start"] for r in regions)
    ax.set_title(f"{len(regions)} place{'s' if len(regions) != 1 else ''} to check by ear"
                 + (f" ({clock_text(total_s)} in all)" if regions else "")
                 + (f"; {n_skip} repeat{'s' if n_skip != 1 else ''} skipped" if n_skip else ""),
                 loc="right", fontsize=6.5, color=pal.MUTED, pad=1)

    # 3. boundary density
    ax = axes["density"]
    step = _step(span, 150)
    edges = np.arange(math.floor(x0 / step) * step, x1 + step, step)
    mt = marks["_t"].to_numpy(np.float64)
    fam = np.array([pal.family_of(k) for k in marks["trial_type"]]) if len(marks) else np.zeros(0, dtype=str)
    bottom = np.zeros(edges.size - 1)
    handles = []
    for f in _DENSITY_FAMILIES:
        counts = np.histogram(mt[fam == f], bins=edges)[0].astype(float)
        if counts.any():
            handles.append(ax.bar(edges[:-1], counts, width=step, bottom=bottom, align="edge",
                                  color=pal.FAMILY_COLOURS[f], lw=0, zorder=2, label=pal.FAMILY_NAMES[f]))
            bottom += counts
    ax.set_ylim(0, max(2.0, float(bottom.max()) * 1.1 if bottom.size else 2.0))
    ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(3, integer=True))
    _row_label(ax, f"boundaries\nper {clock_text(step) if step >= 60 else f'{step:g} s'}")

    # 4. loudness, 5. tempo
    n_disp = int(width_in * _DPI)
    if loud:
        ax = axes["loudness"]
        y, _label, unit = loud
        t, yy = _bins(feat_t, y, x0, x1, n_disp, how="max")
        floor = -60.0
        for k, p in pieces.iterrows():
            ax.axvspan(float(p["start"]), float(p["end"]), color="#f1f2f3", lw=0, zorder=0)
        ax.fill_between(t, floor, np.maximum(yy, floor), color="#8d949a", lw=0, zorder=2)
        ax.set_ylim(floor, max(-10.0, float(np.nanmax(yy)) + 3 if yy.size else -10.0))
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(3))
        _row_label(ax, f"loudness\n({unit or 'LUFS'})")
    if tempo:
        ax = axes["tempo"]
        y, _label, unit = tempo
        t, yy = _bins(feat_t, y, x0, x1, n_disp)
        yy_full = np.full(t.size, np.nan)
        yy_full[:] = yy
        # break the line between pieces
        if len(pieces) and t.size:
            inside = np.zeros(t.size, bool)
            for _, p in pieces.iterrows():
                inside |= (t >= float(p["start"])) & (t <= float(p["end"]))
            yy_full[~inside] = np.nan
        ax.plot(t, yy_full, color=pal.INK, lw=0.9, zorder=2)
        if np.isfinite(yy_full).any():
            lo_, hi_ = np.nanpercentile(yy_full, [1, 99])
            ax.set_ylim(max(0.0, lo_ - 10), hi_ + 10)
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(3))
        _row_label(ax, f"tempo\n({unit or 'BPM'})")

    axes[rows[-1]].set_xlabel(f"{clock_label} (m:ss)" if x1 < 3600 else f"{clock_label} (h:mm:ss)")
    if title:
        fig.suptitle(title, x=_LEFT, ha="left", va="top", fontsize=9.5, fontweight="bold",
                     y=1 - 0.1 / total)
    # legend: families present, plus the check colour
    from matplotlib.patches import Patch

    leg = [Patch(color=h.patches[0].get_facecolor(), label=h.get_label()) for h in handles]
    leg.append(Patch(color=pal.CHECK, label=pal.FAMILY_NAMES["check"]))
    from matplotlib.lines import Line2D

    rc = pal.FAMILY_COLOURS["repeat"]
    if any(r["taken"] for r in reps):
        leg.append(Line2D([], [], color=rc, lw=1.2, label="repeat taken"))
    if any(not r["taken"] for r in reps):
        leg.append(Line2D([], [], color=rc, ls="none", marker="X", ms=6, label="repeat skipped"))
    if sync is not None and len(sync):
        leg.append(Line2D([], [], color=pal.INK, ls="none", marker=pal.GLYPH["sync"], ms=6, label="sync mark"))
    fig.legend(handles=leg, loc="lower left", bbox_to_anchor=(_LEFT, 0.04 / total), ncol=len(leg),
               frameon=False, fontsize=6.5, handlelength=1.2, columnspacing=1.4, borderaxespad=0.0)
    return fig


# ---------------------------------------------------------------------------------------------
# one piece
# ---------------------------------------------------------------------------------------------
def piece_figure(
    *,
    piece: str,
    start: float,
    end: float,
    features: pd.DataFrame | None,
    units: dict[str, str],
    events: pd.DataFrame,
    beats: pd.DataFrame | None = None,
    low_confidence=None,
    time_column: str = "recording",
    clock_label: str = "recording time",
    title: str | None = None,
    width_in: float = 12.0,
    columns: dict[str, str] | None = None,
    system_s: float | None = None,
    tips: dict | None = None,
    id_prefix: str = "p1",
) -> Figure:
    """One piece zoomed: feature lanes, then systems with every boundary labelled.

    Parameters
    ----------
    piece : str
        The piece's name (rows of ``events`` with this ``piece``; session rows such as silences
        and feature changes inside ``[start, end]`` are shown too).
    start, end : float
        The piece's span on the figure's clock (s).
    beats : DataFrame, optional
        Beat grid (``piece``, ``measure``, ``pass``, ``beat`` or ``is_downbeat``, and
        ``time_column``): bar numbers on the second axis.
    system_s : float, optional
        Length of one system (s); default: the piece in equal systems of at most 120 s and
        about 22 boundaries each.
    tips : dict, optional
        Filled with SVG element id -> hover text (label, bar, beat, time, confidence).
    id_prefix : str
        Prefix of the SVG ids (unique per piece on one page).
    Other parameters as :func:`overview_figure`.
    """
    columns = columns or {}
    with _style(), matplotlib.rc_context(_RC):
        return _piece(piece, float(start), float(end), features, units, events, beats,
                      regions_of(low_confidence), time_column, clock_label, title, width_in, columns,
                      system_s, tips if tips is not None else {}, id_prefix)


def _bar_ticks(beats, piece, time_column, a, b):
    """(times, labels) of the bars of ``piece`` starting in [a, b]."""
    if beats is None or not len(beats) or time_column not in beats.columns:
        return np.zeros(0), []
    bt = beats
    if "piece" in bt.columns:
        bt = bt[bt["piece"].astype(str) == str(piece)]
    if "is_downbeat" in bt.columns:
        down = bt["is_downbeat"].map(lambda v: v is True or str(v).lower() == "true")
    elif "beat" in bt.columns:
        down = pd.to_numeric(bt["beat"], errors="coerce") == 1
    else:
        return np.zeros(0), []
    bt = bt[down.to_numpy(bool)]
    t = pd.to_numeric(bt[time_column], errors="coerce").to_numpy(np.float64)
    keep = np.isfinite(t) & (t >= a - 1e-9) & (t <= b + 1e-9)
    meas = bt["measure"].to_numpy()[keep] if "measure" in bt.columns else np.full(keep.sum(), "")
    passes = bt["pass"].to_numpy()[keep] if "pass" in bt.columns else np.ones(keep.sum())
    labels = []
    for m, p in zip(meas, passes):
        txt = "" if is_missing(m) else str(int(float(m))) if str(m).replace(".", "", 1).lstrip("-").isdigit() else str(m)
        if not is_missing(p) and float(p) > 1:
            txt += "\u2032" * int(min(float(p) - 1, 3))
        labels.append(txt)
    return t[keep], labels


def _thin_bars(t, labels, span, width_in):
    """Label every k-th bar so numbers do not collide (k from 1, 2, 4, 5, 10, 20, ...)."""
    if not len(t):
        return t, labels
    per_in = len(t) / max(width_in * (_RIGHT - _LEFT), 1e-9)
    k = next((k for k in (1, 2, 4, 5, 10, 20, 50, 100) if per_in / k <= 3.5), 100)
    shown = [lab if i % k == 0 else "" for i, lab in enumerate(labels)]
    return t, shown


def _place_rows(times: np.ndarray, widths: np.ndarray) -> np.ndarray:
    """Row of each label: the lowest row where ``[t, t + width)`` overlaps no placed label
    (labels in time order; every label gets a row)."""
    order = np.argsort(times, kind="mergesort")
    ends: list[float] = []
    out = np.zeros(times.size, dtype=int)
    for i in order:
        for r, e in enumerate(ends):
            if times[i] >= e:
                ends[r] = times[i] + widths[i]
                out[i] = r
                break
        else:
            ends.append(times[i] + widths[i])
            out[i] = len(ends) - 1
    return out


def _piece(piece, start, end, features, units, events, beats, regions, time_column, clock_label,
           title, width_in, columns, system_s, tips, id_prefix):
    ev = _events_on_clock(events, time_column)
    mine = ev["piece"].astype(str) == str(piece) if "piece" in ev.columns else np.zeros(len(ev), bool)
    session_rows = ev["piece"].map(is_missing) if "piece" in ev.columns else np.ones(len(ev), bool)
    inside = (ev["_t"] >= start - 1e-9) & (ev["_t"] <= end + 1e-9)
    marks = ev[(np.asarray(mine) | (np.asarray(session_rows) & inside.to_numpy()))
               & (ev["trial_type"] != "piece")].copy()
    rank = {k: i for i, k in enumerate(LABEL_PRIORITY)}
    marks["_rank"] = marks["trial_type"].map(lambda k: rank.get(str(k), len(rank)))
    marks = marks.sort_values(["_t", "_rank"], kind="mergesort").reset_index(drop=True)
    regions = [r for r in regions if r["end"] >= start and r["start"] <= end]
    reps = [r for r in repeats_of(events, time_column) if r["end"] >= start and r["start"] <= end]
    dur = max(end - start, 1e-3)
    n_b = len(marks)
    if system_s is None:
        n_sys = max(math.ceil(dur / 120.0), math.ceil(n_b / 22.0), 1)
    else:
        n_sys = max(math.ceil(dur / float(system_s) - 1e-9), 1)
    sys_len = dur / n_sys
    pad = 0.01 * sys_len

    # labels: measured with the Agg renderer at the output dpi, placed per system
    measure = RendererAgg(8, 8, _DPI)
    prop = FontProperties(size=_LABEL_PT)
    axes_px = width_in * (_RIGHT - _LEFT) * _DPI
    texts = [mark_text(r) for _, r in marks.iterrows()]
    mt = marks["_t"].to_numpy(np.float64)
    sys_of = np.clip(((mt - start) // sys_len).astype(int) if n_b else np.zeros(0, int), 0, n_sys - 1)
    rows_of = np.zeros(n_b, dtype=int)
    label_x = mt.copy()
    n_rows = []
    for s in range(n_sys):
        sel = np.flatnonzero(sys_of == s)
        scale = (sys_len + 2 * pad) / axes_px
        widths = np.array([(measure.get_text_width_height_descent(" " + texts[i], prop, ismath=False)[0] + 6.0)
                           * scale for i in sel])
        right = start + (s + 1) * sys_len + pad
        lx = np.minimum(mt[sel], right - widths) if sel.size else np.zeros(0)
        label_x[sel] = lx
        r = _place_rows(lx, widths) if sel.size else np.zeros(0, int)
        rows_of[sel] = r
        n_rows.append(int(r.max()) + 1 if r.size else 1)

    lanes = []
    for role, name, unit in LANE_ROLES:
        s = _lane_series(features, role, columns.get(role), units, unit) if features is not None and len(features) else None
        if s is not None:
            lanes.append((name, s))
    lane_h, row_h, rail_h = 0.62, 0.135, 0.5
    sys_h = [rail_h + row_h * n for n in n_rows]
    top_in, bottom_in = (0.45 if title else 0.15), 0.35
    gaps = 0.42
    spacer = [0.3] if lanes else []          # room between the lanes' clock and the first system
    heights = [lane_h] * len(lanes) + spacer + sys_h
    total = sum(heights) + gaps * (len(heights) - 1) + top_in + bottom_in
    fig = Figure(figsize=(width_in, total), dpi=_DPI)
    FigureCanvasAgg(fig)
    gs = fig.add_gridspec(len(heights), 1, height_ratios=heights,
                          hspace=gaps * len(heights) / sum(heights),
                          left=_LEFT, right=_RIGHT, top=1 - top_in / total, bottom=bottom_in / total)
    feat_t = np.asarray(features.index, dtype=np.float64) if features is not None else np.zeros(0)
    n_disp = int(width_in * _DPI / 2)
    lane_axes = []
    for i, (name, (y, label, unit)) in enumerate(lanes):
        ax = fig.add_subplot(gs[i, 0], sharex=lane_axes[0] if lane_axes else None)
        lane_axes.append(ax)
        x0, x1 = start - 0.01 * dur, end + 0.01 * dur
        ax.set_xlim(x0, x1)
        sel = (feat_t >= x0) & (feat_t <= x1)
        t, yy = _bins(feat_t[sel], y[sel], x0, x1, n_disp)
        for r in regions:
            ax.axvspan(r["start"], max(r["end"], r["start"] + dur * 0.003), color=pal.CHECK, alpha=0.22,
                       lw=0, zorder=0)
        ax.plot(t, yy, color=pal.INK, lw=0.8, zorder=2)
        ax.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(3))
        _row_label(ax, name.replace(" ", "\n") + (f"\n({unit})" if unit else ""))
        ax.set_title(label, loc="right", fontsize=6, color=pal.MUTED, pad=1)
        _clock_axis(ax, x0, x1)
        ax.tick_params(axis="x", labelbottom=(i == len(lanes) - 1))
        if i == 0:  # bar numbers on a second axis
            bt, bl = _bar_ticks(beats, piece, time_column, start, end)
            bt, bl = _thin_bars(bt, bl, dur, width_in)
            top = ax.secondary_xaxis("top")
            top.xaxis.set_major_locator(FixedLocator(bt))
            top.xaxis.set_major_formatter(FuncFormatter(lambda v, p, _l=bl: _l[p] if p is not None and p < len(_l) else ""))
            top.tick_params(labelsize=6, length=2, colors=pal.MUTED)

    for s in range(n_sys):
        a = start + s * sys_len
        b = a + sys_len
        ax = fig.add_subplot(gs[len(lanes) + len(spacer) + s, 0])
        ax.set_xlim(a - pad, b + pad)
        ax.set_ylim(0, rail_h / row_h + n_rows[s] + 0.2)
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        _clock_axis(ax, a - pad, b + pad, most=10)
        ax.tick_params(axis="x", length=2.5, pad=1.5)
        rail = 1.6
        ax.axhline(rail, color="#d5d8db", lw=0.8, zorder=1)
        for r in regions:
            if r["end"] >= a and r["start"] <= b:
                ax.axvspan(r["start"], max(r["end"], r["start"] + sys_len * 0.004), ymax=1.0, color=pal.CHECK,
                           alpha=0.18, lw=0, zorder=0)
        for r in reps:
            if r["end"] >= a and r["start"] <= b:
                c = pal.FAMILY_COLOURS["repeat"]
                if r["taken"]:
                    ax.plot([r["start"], r["start"], r["end"], r["end"]], [0.9, 0.55, 0.55, 0.9], color=c, lw=1.1,
                            zorder=2, clip_on=True)
                else:
                    ax.axvline(r["start"], color=c, lw=1.0, ls=(0, (2, 2)), zorder=2)
        bt, bl = _bar_ticks(beats, piece, time_column, a, b)
        if bt.size:
            ax.vlines(bt, rail - 0.35, rail + 0.35, color="#b9bec3", lw=0.6, zorder=1)
            bt2, bl2 = _thin_bars(bt, bl, sys_len, width_in)
            top = ax.secondary_xaxis("top")
            top.xaxis.set_major_locator(FixedLocator(bt2))
            top.xaxis.set_major_formatter(FuncFormatter(lambda v, p, _l=bl2: _l[p] if p is not None and p < len(_l) else ""))
            top.tick_params(labelsize=6, length=0, pad=1, colors=pal.MUTED)
        if s == 0:
            ax.set_title(f"every boundary, {n_sys} system{'s' if n_sys != 1 else ''} of {clock_text(sys_len)} "
                         f"({clock_label}, m:ss); bar numbers on top (\u2032 = repeated pass)", loc="left", fontsize=6.5,
                         color=pal.MUTED, pad=12 if bt.size else 2)
        for i in np.flatnonzero(sys_of == s):
            row = marks.iloc[i]
            kind = str(row["trial_type"])
            colour = pal.colour_of(kind)
            gid = f"{id_prefix}-m{i + 1}"
            glyph = pal.GLYPH.get(kind, "o")
            if kind == "hairpin" and "dim" in str(row.get("label", "")).lower():
                glyph = "<"
            ax.plot([mt[i]], [rail], ls="none", marker=glyph, ms=5.5, mew=1.1, color=colour,
                    mec=colour, zorder=4, gid=gid, clip_on=False)
            d = pd.to_numeric(pd.Series([row.get("duration")]), errors="coerce").iloc[0]
            if kind in ("hairpin", "tempo_change", "fermata", "pause", "silence") and np.isfinite(d) and d > 0:
                ax.plot([mt[i], min(mt[i] + float(d), b + pad)], [rail - 0.45, rail - 0.45], color=colour, lw=1.4,
                        solid_capstyle="butt", zorder=3, clip_on=True)
            y = rail + 0.75 + rows_of[i]
            ax.plot([mt[i], mt[i]], [rail + 0.25, y - 0.2], color=colour, lw=0.4, alpha=0.6, zorder=2)
            if label_x[i] < mt[i]:  # pulled left at the system's end: a short foot to its mark
                ax.plot([label_x[i], mt[i]], [y - 0.2, y - 0.2], color=colour, lw=0.4, alpha=0.6, zorder=2)
            ax.text(label_x[i], y, " " + texts[i], ha="left", va="center", fontsize=_LABEL_PT, color=colour,
                    zorder=5, clip_on=False)
            tips[gid] = _tip(row, kind, mt[i], end)
    if title:
        fig.suptitle(title, x=_LEFT, ha="left", va="top", fontsize=9.5, fontweight="bold", y=1 - 0.08 / total)
    return fig


def _tip(row, kind, t, span_end) -> str:
    lab = row.get("label")
    text = str(lab) if not is_missing(lab) else kind
    parts = [f"{kind.replace('_', ' ')}: {text}"]
    m = row.get("measure")
    if not is_missing(m):
        where = f"bar {int(float(m))}" if str(m).replace(".", "", 1).lstrip("-").isdigit() else f"bar {m}"
        b = row.get("beat")
        if not is_missing(b):
            where += f", beat {_beat_text(b)}"
        parts.append(where)
    parts.append(clock_text(t, span_s=span_end, decimals=2))
    c = row.get("confidence")
    if not is_missing(c):
        try:
            parts.append(f"confidence {float(c):.2f}")
        except (TypeError, ValueError):
            pass
    return " \u00b7 ".join(parts)


# ---------------------------------------------------------------------------------------------
# rendering
# ---------------------------------------------------------------------------------------------
def figure_png(fig: Figure, *, dpi: int = _DPI) -> bytes:
    """PNG bytes of ``fig`` (Agg, fixed dpi, no software-version text chunk): deterministic."""
    buf = io.BytesIO()
    with _style(), matplotlib.rc_context(_RC):
        FigureCanvasAgg(fig)
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    return buf.getvalue()


_SVG_HEAD = re.compile(r"^.*?(<svg\b)", re.S)


def figure_svg(fig: Figure, *, tips: dict | None = None, svg_id: str | None = None) -> str:
    """The figure as inline SVG text for a web page: text kept as text, no date, no creator,
    no XML prolog or DOCTYPE; every element whose id is in ``tips`` gets a ``<title>`` with its
    hover text (escaped). Deterministic."""
    from matplotlib.backends.backend_svg import FigureCanvasSVG

    buf = io.StringIO()
    with _style(), matplotlib.rc_context(_RC):
        FigureCanvasSVG(fig)
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None,
                                                 "Type": None})
        FigureCanvasAgg(fig)
    svg = _SVG_HEAD.sub(r"\1", buf.getvalue(), count=1)
    # inline SVG in HTML needs no namespace declarations (HTML parsing rules for foreign content)
    svg = re.sub(r'\s+xmlns(:xlink)?="[^"]*"', "", svg)
    svg = re.sub(r"<metadata>.*?</metadata>\s*", "", svg, flags=re.S)
    for gid, text in (tips or {}).items():
        svg = svg.replace(f'<g id="{gid}">', f'<g id="{gid}"><title>{html.escape(str(text))}</title>', 1)
    if svg_id:
        svg = svg.replace("<svg ", f'<svg id="{html.escape(svg_id)}" ', 1)
    # the ids matplotlib makes up for its own groups are unique within one figure only: prefix them
    if svg_id:
        svg = re.sub(r'id="([a-z]+_\d+)"', lambda m: f'id="{svg_id}-{m.group(1)}"', svg)
        svg = re.sub(r'(xlink:href|href)="#([a-z]+_\d+)"', lambda m: f'{m.group(1)}="#{svg_id}-{m.group(2)}"', svg)
        svg = re.sub(r'url\(#([a-z]+_\d+)\)', lambda m: f"url(#{svg_id}-{m.group(1)})", svg)
    return svg
