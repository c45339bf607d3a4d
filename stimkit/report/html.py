"""The session report: one self-contained, printable HTML page plus the overview PNG.

What it writes
--------------
``<name>.png`` (the overview figure as given) and ``<name>.html``: the run summary, the figure
(embedded as a base64 ``data:`` URI, so the page is one file), the pieces with their summary
numbers, the clock-sync fit, the statistics tables, the events (counts per kind and the first
rows of each kind) and the warnings.

Conventions
-----------
- Self-contained: inline CSS only; no script, no external reference of any kind.
- Every text from the data is escaped (:func:`html.escape`), so a label such as ``<ff>`` or
  ``a & b`` shows as written.
- Deterministic: no date or host in the page; numbers in a fixed format (seconds with 3
  decimals); equal inputs give byte-identical files.
- Printable: a print style sheet drops the background tints and keeps table rows whole.
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

__all__ = ["write_report", "report_html", "HEADINGS"]

_CSS = """
:root { --ink:#1d2a36; --muted:#5b6875; --rule:#c9d2da; --band:#eef2f6; --accent:#2f6f8f; --warn:#8c2d1c; }
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
@media print {
  body { max-width: none; padding: 0; font-size: 11px; }
  th, tr:nth-child(even) td { background: none; }
  tr, figure { page-break-inside: avoid; }
  h2 { page-break-after: avoid; }
}
"""

_ALT = "Overview of the session: features against time with every boundary marked"
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
    "residual_ms": "residual (ms)", "strength": "strength (SD)", "pre_mean": "mean before",
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
    show = [c for c in order if c != "trial_type" and not events[c].map(is_missing).all()]
    for k in kinds:
        parts.append(f"<h3>{_esc(k)}</h3>")
        parts.append(_table(events.loc[kind == k, show], max_rows=max_rows_per_kind))
    return "\n".join(parts)


def report_html(
    *,
    title: str,
    figure_png: bytes,
    summary: dict,
    pieces: pd.DataFrame | None,
    events: pd.DataFrame | None,
    stats: dict | None,
    warnings: list[str],
    sync: dict | None,
    max_rows_per_kind: int = 25,
    max_stat_rows: int = 200,
    sections: list[str] | None = None,
) -> str:
    """The report page as text (see :func:`write_report`); ``sections`` are ready HTML
    fragments (each opening with an ``<h2>``) placed after the statistics."""
    from .. import __version__

    img = base64.b64encode(figure_png).decode("ascii")
    body = [f"<h1>{_esc(title)}</h1>",
            '<p class="lead">Stimulus events and features of one listening session, on one clock.</p>',
            _facts(summary or {}),
            "<h2>Overview</h2>",
            f'<figure><img alt="{_esc(_ALT)}" src="data:image/png;base64,{img}">'
            "<figcaption>Lanes share the time axis; vertical lines are boundaries (dashed: feature "
            "change points); tinted spans are pieces; hatched spans are low-confidence alignment."
            "</figcaption></figure>",
            "<h2>Pieces</h2>",
            _block(pieces, max_rows=max_stat_rows) if pieces is not None else "<p>none</p>",
            "<h2>Clock sync</h2>",
            _block(sync, max_rows=max_stat_rows) if sync else
            "<p>No sync given: onsets equal recording time.</p>",
            "<h2>Statistics</h2>"]
    if stats:
        for k, v in stats.items():
            body.append(f"<h3>{_esc(k)}</h3>")
            body.append(_block(v, max_rows=max_stat_rows))
    else:
        body.append("<p>none</p>")
    body += list(sections or [])
    body += ["<h2>Events</h2>", _events_section(events, max_rows_per_kind=max_rows_per_kind),
             "<h2>Warnings</h2>"]
    if warnings:
        body.append('<ul class="warnings">' + "".join(f"<li>{_esc(w)}</li>" for w in warnings) + "</ul>")
    else:
        body.append("<p>none</p>")
    body.append(f"<footer>stimkit {_esc(__version__)}</footer>")
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{_esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")


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
    sections: list[str] | None = None,
    name: str = "report",
    max_rows_per_kind: int = 25,
) -> list[Path]:
    """Stage ``<name>.png`` and ``<name>.html``.

    Parameters
    ----------
    outs : OutputSet
        The run's output transaction.
    title : str
        Page title.
    figure_png : bytes
        The overview PNG (:func:`stimkit.report.figure.figure_png`), written as is and embedded.
    summary : dict
        Session facts (label -> scalar), shown at the top.
    pieces : DataFrame, optional
        One row per piece with its summary numbers (e.g.
        :func:`stimkit.stats.windows.piece_summary`).
    events : DataFrame, optional
        The event table; counts per ``trial_type`` and the first ``max_rows_per_kind`` rows of
        each kind are shown.
    stats : dict, optional
        Title -> DataFrame or dict (e.g. change points, coincidence result).
    warnings : list of str
        Shown as a list.
    sync : dict, optional
        The sync fit (offset, drift ppm, residuals ...): scalars as facts, nested DataFrames or
        dicts as tables.

    Returns
    -------
    list of Path
        ``[png, html]``.
    """
    page = report_html(title=title, figure_png=figure_png, summary=summary, pieces=pieces,
                       events=events, stats=stats, warnings=warnings, sync=sync,
                       max_rows_per_kind=max_rows_per_kind, sections=sections)
    p1 = outs.write_bytes(f"{name}.png", figure_png)
    p2 = outs.write_text(f"{name}.html", page)
    return [p1, p2]
