"""The session report: one self-contained HTML page, the overview PNG for print, and the
check-by-ear file beside them.

What it writes
--------------
``<name>.png`` (the overview figure, for print) and ``<name>.html``: the run summary and the
cautions; *check by ear* (every place where the alignment is unsure or a repeat was decided,
with its time, piece, bars and reason, and how to use the click track); the overview (inline
SVG: pieces as blocks, the places to check, boundary density, loudness, tempo); one panel per
piece with every boundary labelled (inline SVG); the clock-sync fit with residuals in
milliseconds; the statistics tables; the events (counts per kind and the first rows of each
kind); extra sections given by other modules (e.g. physiology); the warnings.

Conventions
-----------
- Self-contained and offline: inline CSS, inline SVG and a few lines of inline JavaScript (zoom
  and pan of the pictures; the page reads fine without it); no external reference of any kind,
  no ``http(s)://`` in the page.
- One clock: every table and picture in the page uses the clock named by ``clock_label`` (the
  recorder clock when a sync was given); tables of other times are converted by the caller.
- Every text from the data is escaped (:func:`html.escape`), so a label such as ``<ff>`` or
  ``a & b`` shows as written.
- Deterministic: no date or host in the page; numbers in a fixed format; equal inputs give
  byte-identical files.
- Printable: a print style sheet drops the zoom controls, starts each piece on a new page and
  keeps table rows whole.
"""

from __future__ import annotations

import base64
import html
import math
from pathlib import Path

import numpy as np
import pandas as pd

from ..export.tables import OutputSet, is_missing
from ..levels import EVENT_COLUMNS

__all__ = ["write_report", "report_html", "HEADINGS", "CAUTIONS", "sync_section"]

#: The cautions every report carries (README "Cautions").
CAUTIONS = ("stimkit is a research tool, not a medical device: its outputs describe the music "
            "stimulus and must not be used for decisions about a participant's care. Statistics show "
            "association, not cause. The study protocol, the ethics approval and the clinical staff "
            "decide what is safe; defer to local rules and licensed practice. Check the placements "
            "by ear before relying on them.")

_CSS = """
:root { --ink:#333333; --muted:#6b7075; --rule:#d3d6d9; --band:#f1f2f3; --accent:#665500; --warn:#8a3a00;
         --check:#bb5577; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color: var(--ink);
       margin: 0 auto; max-width: 1240px; padding: 18px 22px 40px; }
h1 { font-size: 22px; margin: 0 0 4px; }
h2 { font-size: 16px; margin: 26px 0 8px; padding-bottom: 3px; border-bottom: 2px solid var(--accent); }
h3 { font-size: 14px; margin: 16px 0 6px; color: var(--accent); }
p.lead { color: var(--muted); margin: 0 0 14px; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 2px 16px; margin: 0; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; font-variant-numeric: tabular-nums; }
figure { margin: 10px 0; }
figure img { width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: 12px; }
table { border-collapse: collapse; font-size: 12.5px; margin: 4px 0 10px; }
th, td { padding: 3px 8px; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
tr:nth-child(even) td { background: #fafbfc; }
p.more { color: var(--muted); font-size: 12px; margin: 0 0 8px; }
ul.warnings li { color: var(--warn); }
footer { margin-top: 30px; color: var(--muted); font-size: 12px; }
p.caution { border-left: 4px solid var(--check); padding: 6px 10px; background: #fbf3f6; font-size: 13px; }
.pic { position: relative; border: 1px solid var(--rule); overflow: hidden; cursor: grab; }
.pic svg { display: block; width: 100%; height: auto; }
.pic .zoom { position: absolute; right: 6px; top: 6px; display: flex; gap: 4px; }
.pic .zoom button { font: 12px system-ui, sans-serif; padding: 1px 7px; border: 1px solid var(--rule);
  background: #fff; border-radius: 3px; cursor: pointer; }
td.check { border-left: 4px solid var(--check); }
span.key { display: inline-block; margin: 0 14px 4px 0; white-space: nowrap; font-size: 12.5px; }
span.key b { display: inline-block; width: 1.2em; text-align: center; }
section.piece { margin-top: 18px; }
@media print {
  body { max-width: none; padding: 0; font-size: 11px; }
  th, tr:nth-child(even) td { background: none; }
  tr, figure { page-break-inside: avoid; }
  h2 { page-break-after: avoid; }
  .pic .zoom { display: none; }
  .pic { border: none; }
  section.piece { page-break-before: always; }
}
"""

_ALT = "Overview of the session: pieces, places to check by ear, boundary density, loudness, tempo"

#: A few lines of vanilla JavaScript: zoom (buttons, Ctrl + wheel, double-click) and drag-to-pan
#: on every picture, by changing the SVG viewBox. The page works without it.
_JS = """
(function () {
  document.querySelectorAll('.pic').forEach(function (box) {
    var svg = box.querySelector('svg'); if (!svg) return;
    var vb0 = svg.getAttribute('viewBox').split(/[ ,]+/).map(Number), vb = vb0.slice();
    function set() { svg.setAttribute('viewBox', vb.join(' ')); }
    function zoom(f, cx, cy) {
      var w = Math.min(vb0[2], Math.max(vb0[2] / 40, vb[2] / f)), h = w * vb0[3] / vb0[2];
      cx = cx === undefined ? vb[0] + vb[2] / 2 : cx; cy = cy === undefined ? vb[1] + vb[3] / 2 : cy;
      vb = [Math.min(Math.max(cx - w / 2, vb0[0]), vb0[0] + vb0[2] - w),
            Math.min(Math.max(cy - h / 2, vb0[1]), vb0[1] + vb0[3] - h), w, h]; set();
    }
    function at(e) { var r = svg.getBoundingClientRect();
      return [vb[0] + (e.clientX - r.left) / r.width * vb[2], vb[1] + (e.clientY - r.top) / r.height * vb[3]]; }
    var bar = document.createElement('div'); bar.className = 'zoom';
    [['+', function () { zoom(2); }], ['\u2212', function () { zoom(0.5); }],
     ['whole', function () { vb = vb0.slice(); set(); }]].forEach(function (b) {
      var k = document.createElement('button'); k.type = 'button'; k.textContent = b[0];
      k.addEventListener('click', b[1]); bar.appendChild(k); });
    box.appendChild(bar);
    svg.addEventListener('wheel', function (e) { if (!e.ctrlKey && !e.metaKey) return;
      e.preventDefault(); var p = at(e); zoom(e.deltaY < 0 ? 1.25 : 0.8, p[0], p[1]); }, {passive: false});
    svg.addEventListener('dblclick', function (e) { var p = at(e); zoom(2, p[0], p[1]); });
    var drag = null;
    svg.addEventListener('mousedown', function (e) { drag = [e.clientX, e.clientY, vb[0], vb[1]]; });
    window.addEventListener('mouseup', function () { drag = null; });
    window.addEventListener('mousemove', function (e) { if (!drag) return;
      var r = svg.getBoundingClientRect();
      vb[0] = Math.min(Math.max(drag[2] - (e.clientX - drag[0]) / r.width * vb[2], vb0[0]), vb0[0] + vb0[2] - vb[2]);
      vb[1] = Math.min(Math.max(drag[3] - (e.clientY - drag[1]) / r.height * vb[3], vb0[1]), vb0[1] + vb0[3] - vb[3]);
      set(); });
  });
})();
"""
_SECONDS_HINT = ("onset", "duration", "nominal", "recording", "start", "end", "time", "duration_s",
                 "offset_s")


def _esc(v) -> str:
    return html.escape(str(v), quote=True)


def _fmt(v, *, column: str = "") -> tuple[str, bool]:
    """(text, is_number) for one cell."""
    if isinstance(v, (list, tuple, np.ndarray)):
        return ", ".join(_fmt(x)[0] for x in v), False
    if is_missing(v):
        return "n/a", False
    if isinstance(v, (bool, np.bool_)):
        return ("yes" if v else "no"), False
    if isinstance(v, (int, np.integer)):
        return str(int(v)), True
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if not math.isfinite(f):
            return "n/a", False
        if column in _SECONDS_HINT or column.endswith("_s"):
            s = f"{f:.3f}"
        elif f == int(f) and abs(f) < 1e9:
            s = str(int(f))
        elif abs(f) >= 1000:
            s = f"{f:.1f}"
        elif abs(f) >= 0.01:
            s = f"{f:.3f}"
        else:
            s = f"{f:.3g}"
        return ("0" + s[2:] if s.startswith("-0") and float(s) == 0 else s), True
    return str(v), False


#: Column or key name -> heading shown to people (other names are shown as they are).
HEADINGS = {
    "duration_s": "duration (s)", "loudness_mean": "loudness mean", "loudness_sd": "loudness SD",
    "lra_lu": "LRA (LU)", "tempo_mean_bpm": "tempo mean (BPM)", "tempo_sd_bpm": "tempo SD (BPM)",
    "tempo_min_bpm": "tempo min (BPM)", "tempo_max_bpm": "tempo max (BPM)",
    "onset_rate_mean_hz": "onsets per s", "loudness_column": "loudness feature",
    "start": "start (s)", "end": "end (s)", "recording": "recording (s)", "onset": "onset (s)",
    "offset_s": "offset (s)", "drift_ppm": "drift (ppm)", "max_residual_s": "largest residual (s)",
    "recording_s": "recording (s)", "recorder_s": "recorder (s)", "residual_s": "residual (s)",
    "residual_ms": "residual (ms)", "recording_ms": "recording (s)", "strength": "strength (SD)", "pre_mean": "mean before",
    "post_mean": "mean after", "difference": "after - before", "observed_hits": "boundaries hit",
    "expected_hits": "expected by chance", "p_value": "p", "tolerance_s": "tolerance (s)",
}


def _heading(name) -> str:
    return HEADINGS.get(str(name), str(name))


def _table(df: pd.DataFrame, *, max_rows: int | None = None) -> str:
    cols = [str(c) for c in df.columns]
    out = ["<table>", "<thead><tr>" + "".join(f"<th>{_esc(_heading(c))}</th>" for c in cols)
           + "</tr></thead>",
           "<tbody>"]
    rows = df if max_rows is None else df.head(max_rows)
    for rec in rows.itertuples(index=False, name=None):
        cells = []
        for c, v in zip(cols, rec):
            text, num = _fmt(v, column=c)
            cells.append(f'<td class="num">{_esc(text)}</td>' if num else f"<td>{_esc(text)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    if max_rows is not None and len(df) > max_rows:
        out.append(f'<p class="more">{len(df) - max_rows} more row(s) in the data files.</p>')
    return "\n".join(out)


def _is_records(v) -> bool:
    return isinstance(v, (list, tuple)) and len(v) > 0 and all(isinstance(x, dict) for x in v)


def _facts(d: dict) -> str:
    items = []
    for k, v in d.items():
        if isinstance(v, (dict, pd.DataFrame)) or _is_records(v):
            continue
        if isinstance(v, (list, tuple)) and not v:
            v = "none"
        text, _ = _fmt(v, column=str(k))
        items.append(f"<dt>{_esc(_heading(k))}</dt><dd>{_esc(text)}</dd>")
    return '<dl class="facts">' + "".join(items) + "</dl>" if items else ""


def _block(value, *, max_rows: int) -> str:
    if isinstance(value, pd.DataFrame):
        return _table(value, max_rows=max_rows) if len(value) else "<p>none</p>"
    if isinstance(value, dict):
        parts = [_facts(value)]
        for k, v in value.items():
            if isinstance(v, (dict, pd.DataFrame)):
                parts.append(f"<h3>{_esc(_heading(k))}</h3>" + _block(v, max_rows=max_rows))
            elif _is_records(v):
                parts.append(f"<h3>{_esc(_heading(k))}</h3>"
                             + _table(pd.DataFrame(list(v)), max_rows=max_rows))
        return "\n".join(p for p in parts if p)
    text, _ = _fmt(value)
    return f"<p>{_esc(text)}</p>"


def _events_section(events: pd.DataFrame, *, max_rows_per_kind: int) -> str:
    if events is None or not len(events):
        return "<p>No events.</p>"
    if "trial_type" not in events.columns:
        return _table(events, max_rows=max_rows_per_kind)
    kind = events["trial_type"].map(lambda v: "n/a" if is_missing(v) else str(v)).to_numpy()
    kinds = list(dict.fromkeys(kind))
    parts = [_table(pd.DataFrame({"kind": kinds, "events": [int((kind == k).sum()) for k in kinds]}))]
    order = [c for c in EVENT_COLUMNS if c in events.columns] + \
        [c for c in events.columns if c not in EVENT_COLUMNS]
    # one clock on the page: onset and duration only (recording, nominal and score_qn are in the TSV)
    show = [c for c in order if c not in ("trial_type", "recording", "nominal", "score_qn")
            and not events[c].map(is_missing).all()]
    for k in kinds:
        parts.append(f"<h3>{_esc(k)}</h3>")
        parts.append(_table(events.loc[kind == k, show], max_rows=max_rows_per_kind))
    return "\n".join(parts)


def sync_section(sync: dict | None) -> str:
    """The clock-sync fit for people: offset, drift, residuals in milliseconds, and what two
    marks can and cannot tell (two marks fix offset and drift exactly: zero residual by
    construction, no check of the fit)."""
    if not sync:
        return "<p>No sync given: onsets equal recording time.</p>"
    facts = {}
    if "method" in sync:
        facts["method"] = {"marks": "sync marks in the recording", "offset": "stated offset",
                           "none": "none"}.get(str(sync["method"]), str(sync["method"]))
    if "formula" in sync:
        facts["formula"] = sync["formula"]
    if "offset_s" in sync:
        facts["offset (s)"] = f"{float(sync['offset_s']):.6f}"
    if "drift_ppm" in sync:
        facts["drift (ppm)"] = f"{float(sync['drift_ppm']):.3f}"
    pts = [x for x in sync.get("points", []) or [] if isinstance(x, dict)]
    if len(pts) == 2:
        facts["residuals"] = ("zero by construction: two marks fix the offset and the drift exactly, so the "
                              "fit cannot be checked; a third mark would check it")
    elif pts:
        worst = max(abs(float(x.get("residual_s", 0.0))) for x in pts) * 1000.0
        facts["largest residual (ms)"] = f"{worst:.3f}"
    elif "residuals_ms" in sync:
        r = [float(x) for x in sync["residuals_ms"]]
        facts["largest residual (ms)"] = f"{max(abs(x) for x in r):.3f}" if r else "n/a"
    for k, v in sync.items():
        if k in ("method", "formula", "offset_s", "drift_ppm", "points", "max_residual_s", "warnings",
                 "residuals_ms") or isinstance(v, (dict, list, tuple, pd.DataFrame)):
            continue
        facts[_heading(k)] = v
    out = [_facts(facts)]
    if pts:
        tab = pd.DataFrame({"mark": np.arange(1, len(pts) + 1),
                            "recording_s": [float(x.get("recording_s", np.nan)) for x in pts],
                            "recorder_s": [float(x.get("recorder_s", np.nan)) for x in pts],
                            "residual_ms": [f"{float(x.get('residual_s', np.nan)) * 1000.0:.3f}" for x in pts]})
        out.append(_table(tab))
    w = sync.get("warnings") or []
    if w:
        out.append('<ul class="warnings">' + "".join(f"<li>{_esc(x)}</li>" for x in w) + "</ul>")
    return "\n".join(out)


#: Glyphs of the boundary kinds as text, for the key under the pictures (same shapes as drawn).
_KEY_GLYPHS = {
    "dynamic": "\u25cf", "hairpin": "\u25b6", "accent": "\u25b2", "tempo": "\u25a0",
    "tempo_change": "\u25c6", "fermata": "\u2b1f", "pause": "\u2b22", "section": "|",
    "key": "\u2605", "meter": "\u271a", "silence": "\u2013", "feature_change": "\u2715",
    "repeat": "\u2b2e", "sync": "+",
}


def _glyph_key() -> str:
    from . import palette as pal

    parts = []
    for kind, g in _KEY_GLYPHS.items():
        parts.append(f'<span class="key"><b style="color:{pal.colour_of(kind)}">{_esc(g)}</b> '
                     f"{_esc(kind.replace('_', ' '))}</span>")
    parts.append(f'<span class="key"><b style="color:{pal.CHECK}">\u2588</b> check by ear</span>')
    return "<p>" + "".join(parts) + "</p>"


def _clock_cell(v) -> str:
    from .figure import clock_text

    return clock_text(v, decimals=1)


def _check_section(check: pd.DataFrame | None, check_audio: str | None) -> str:
    out = []
    if check is None or not len(check):
        out.append("<p>Nothing flagged: the alignment is confident everywhere and no repeat was in doubt. "
                   "Still listen to a few boundaries.</p>")
    else:
        n = len(check)
        out.append(f"<p>{n} place{'s' if n != 1 else ''} to listen to, in time order. Times on the "
                   "page's clock (m:ss.s).</p>")
        rows = ["<table><thead><tr><th>from</th><th>to</th><th>piece</th><th>bars</th><th>what</th>"
                "</tr></thead><tbody>"]
        for r in check.itertuples(index=False):
            piece = "n/a" if is_missing(r.piece) else str(r.piece)
            rows.append(f'<tr><td class="num check">{_esc(_clock_cell(r.start))}</td>'
                        f'<td class="num">{_esc(_clock_cell(r.end))}</td><td>{_esc(piece)}</td>'
                        f'<td class="num">{_esc(r.bars or "n/a")}</td><td>{_esc(r.what)}</td></tr>')
        rows.append("</tbody></table>")
        out.append("\n".join(rows))
    if check_audio:
        out.append(f'<p>Listen with <a href="{_esc(check_audio)}">{_esc(check_audio)}</a> (beside this '
                   "page): the recording with a soft low click on every placed downbeat and a louder, "
                   "higher click on every placed boundary. Where the clicks do not fall with the music, "
                   "the placement is wrong there. Its times are recording time (the file is the "
                   "recording).</p>")
    return "\n".join(out)


def report_html(
    *,
    title: str,
    figure_png: bytes | None = None,
    summary: dict,
    pieces: pd.DataFrame | None,
    events: pd.DataFrame | None,
    stats: dict | None,
    warnings: list[str],
    sync: dict | None,
    overview_svg: str | None = None,
    piece_panels: list[dict] | None = None,
    check: pd.DataFrame | None = None,
    check_audio: str | None = None,
    clock_label: str | None = None,
    extra_sections: list[tuple[str, str]] | None = None,
    max_rows_per_kind: int = 25,
    max_stat_rows: int = 200,
) -> str:
    """The report page as text (see :func:`write_report`)."""
    from .. import __version__

    clock = clock_label or "recording time"
    body = [f"<h1>{_esc(title)}</h1>",
            f'<p class="lead">Stimulus events and features of one listening session. Every time on this '
            f"page is {_esc(clock)}, as m:ss or seconds.</p>",
            f'<p class="caution">{_esc(CAUTIONS)}</p>',
            _facts(summary or {}),
            "<h2>Check by ear</h2>", _check_section(check, check_audio),
            "<h2>Overview</h2>"]
    if overview_svg:
        body.append(f'<figure><div class="pic" role="img" aria-label="{_esc(_ALT)}">{overview_svg}</div>'
                    "<figcaption>Pieces as blocks (click one for its panel), the places to check by ear, "
                    "how many boundaries fall in each stretch of time, loudness and tempo. Hover for "
                    "details; zoom with the buttons, Ctrl + wheel or a double-click, drag to move."
                    "</figcaption></figure>")
    elif figure_png:
        img = base64.b64encode(figure_png).decode("ascii")
        body.append(f'<figure><img alt="{_esc(_ALT)}" src="data:image/png;base64,{img}"></figure>')
    body.append(_glyph_key())
    body.append("<h2>Pieces</h2>")
    body.append(_block(pieces, max_rows=max_stat_rows) if pieces is not None else "<p>none</p>")
    for k, panel in enumerate(piece_panels or [], start=1):
        body.append(f'<section class="piece" id="piece-{k}"><h3>{k}. {_esc(panel.get("name", ""))}</h3>')
        if panel.get("facts"):
            body.append(_facts(panel["facts"]))
        if panel.get("svg"):
            body.append(f'<div class="pic" role="img" aria-label="{_esc(panel.get("name", ""))}: every '
                        f'boundary">{panel["svg"]}</div>')
        body.append("</section>")
    body += ["<h2>Clock sync</h2>", sync_section(sync), "<h2>Statistics</h2>"]
    if stats:
        for k, v in stats.items():
            body.append(f"<h3>{_esc(k)}</h3>")
            body.append(_block(v, max_rows=max_stat_rows))
    else:
        body.append("<p>none</p>")
    body += ["<h2>Events</h2>", _events_section(events, max_rows_per_kind=max_rows_per_kind)]
    for heading, fragment in extra_sections or []:
        body += [f"<h2>{_esc(heading)}</h2>", fragment]
    body.append("<h2>Warnings</h2>")
    if warnings:
        body.append('<ul class="warnings">' + "".join(f"<li>{_esc(w)}</li>" for w in warnings) + "</ul>")
    else:
        body.append("<p>none</p>")
    body.append(f"<footer>stimkit {_esc(__version__)}</footer>")
    script = f"<script>{_JS}</script>\n" if (overview_svg or piece_panels) else ""
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{_esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n" + script + "</body>\n</html>\n")


def write_report(
    outs: OutputSet,
    *,
    title: str,
    figure_png: bytes,
    summary: dict,
    pieces: pd.DataFrame | None,
    events: pd.DataFrame | None,
    stats: dict | None,
    warnings: list[str],
    sync: dict | None,
    name: str = "report",
    max_rows_per_kind: int = 25,
    **page,
) -> list[Path]:
    """Stage ``<name>.png`` and ``<name>.html``.

    Parameters
    ----------
    outs : OutputSet
        The run's output transaction.
    title : str
        Page title.
    figure_png : bytes
        The overview PNG (:func:`stimkit.report.figure.figure_png`), written for print (and
        embedded in the page only when no ``overview_svg`` is given).
    summary : dict
        Session facts (label -> scalar), shown at the top.
    pieces : DataFrame, optional
        One row per piece with its summary numbers (e.g.
        :func:`stimkit.stats.windows.piece_summary`).
    events : DataFrame, optional
        The event table; counts per ``trial_type`` and the first ``max_rows_per_kind`` rows of
        each kind are shown.
    stats : dict, optional
        Title -> DataFrame or dict (e.g. change points, coincidence result), on the page's clock.
    warnings : list of str
        Shown as a list.
    sync : dict, optional
        The sync fit (:meth:`stimkit.timeline.clock.ClockFit.to_dict`), see :func:`sync_section`.
    **page
        ``overview_svg``, ``piece_panels`` (dicts with ``name``, ``svg``, ``facts``), ``check``
        (:func:`stimkit.report.check.check_places`), ``check_audio`` (file name beside the page),
        ``clock_label``, ``extra_sections`` (list of (heading, HTML fragment), shown before the
        warnings: the hook for other modules' sections).

    Returns
    -------
    list of Path
        ``[png, html]``.
    """
    text = report_html(title=title, figure_png=figure_png, summary=summary, pieces=pieces,
                       events=events, stats=stats, warnings=warnings, sync=sync,
                       max_rows_per_kind=max_rows_per_kind, **page)
    p1 = outs.write_bytes(f"{name}.png", figure_png)
    p2 = outs.write_text(f"{name}.html", text)
    return [p1, p2]
