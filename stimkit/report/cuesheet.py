"""The cue sheet: a printable, self-contained HTML page of the planned boundaries.

What it computes
----------------
:func:`cue_sheet_html` renders, per piece, every boundary with its bar, beat, nominal time (and
programme time when several pieces are planned) and *what changes* ("p -> mf", "q 84 -> 97",
"G major -> D major"), with an empty box to tick during a live session. One file, inline CSS,
no scripts, no external resources; A4/Letter friendly in print (table headers repeat, rows are
not split across pages).

Conventions: times are nominal (notated tempo) in ``m:ss.s``; the text is escaped; the output is
deterministic (no dates, fixed order: programme order, then ``score_qn``).
"""

from __future__ import annotations

import html
import math

import pandas as pd

__all__ = ["cue_sheet_html", "change_text"]

_KIND_NAMES = {
    "piece": "piece", "dynamic": "dynamic", "hairpin": "hairpin", "accent": "accent",
    "tempo": "tempo", "tempo_change": "tempo change", "fermata": "fermata", "key": "key",
    "meter": "meter", "section": "section", "pause": "pause",
}

_CSS = """
body { font-family: system-ui, -apple-system, 'Segoe UI', Roboto, Arial, sans-serif; margin: 1.5em;
       color: #111; font-size: 11pt; }
h1 { font-size: 16pt; margin: 0 0 .2em 0; } h2 { font-size: 13pt; margin: 1.2em 0 .3em 0;
       border-bottom: 2px solid #333; padding-bottom: .1em; }
p.meta { margin: .1em 0 .6em 0; color: #333; }
table { border-collapse: collapse; width: 100%; margin-bottom: 1em; }
th, td { border: 1px solid #bbb; padding: 2px 5px; text-align: left; vertical-align: top; }
th { background: #eee; } td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.box { width: 1.2em; text-align: center; }
tr.k-tempo td, tr.k-tempo_change td { background: #eef4ff; }
tr.k-key td, tr.k-meter td, tr.k-section td { background: #f3f3f3; }
tr.k-pause td, tr.k-fermata td { background: #fff4e0; }
tr.k-piece td { font-weight: bold; }
ul.warn { color: #7a3b00; }
@media print { body { margin: 0; font-size: 9.5pt; } thead { display: table-header-group; }
  tr { page-break-inside: avoid; } h2 { page-break-after: avoid; } section.piece { page-break-before: auto; } }
"""


def _t(s: float) -> str:
    if s is None or not math.isfinite(float(s)):
        return ""
    s = max(float(s), 0.0)
    return f"{int(s // 60)}:{s % 60:04.1f}"


def _num(v, fmt="{:g}") -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return ""
    return "" if not math.isfinite(f) else fmt.format(f)


def change_text(table: pd.DataFrame, *, end_bars=None) -> list[str]:
    """For each row, a short 'what changes' text using the previous row of the same kind.

    ``end_bars`` (optional, one per row) is the printed bar where a spanning marking ends.
    """
    prev: dict[str, object] = {}
    out = []
    if end_bars is None:
        end_bars = [None] * len(table)
    for r, end_bar in zip(table.itertuples(index=False), end_bars):
        k, lab, val = r.trial_type, str(r.label), r.value
        if k == "dynamic":
            txt = f"{prev.get(k, '?')} \u2192 {lab}" if k in prev else f"starts {lab}"
            prev[k] = lab
        elif k in ("tempo", "tempo_change"):
            bpm = _num(val, "{:.0f}")
            before = prev.get("bpm")
            txt = (f"q {before} \u2192 {bpm}" if before is not None else f"q = {bpm}") if bpm else lab
            if k == "tempo_change" and isinstance(r.end_qn, float) and math.isfinite(r.end_qn):
                txt += f" (gradually, until {_t(r.nominal_end)})"
            if bpm:
                prev["bpm"] = bpm
        elif k in ("key", "meter"):
            txt = f"{prev.get(k)} \u2192 {lab}" if k in prev else lab
            prev[k] = lab
        elif k == "hairpin":
            where = f" (bar {end_bar})" if end_bar is not None else ""
            txt = f"{lab} until {_t(r.nominal_end)}{where}" if math.isfinite(r.nominal_end) else lab
        elif k in ("pause", "fermata"):
            dur = (r.nominal_end - r.nominal) if math.isfinite(r.nominal_end) else float("nan")
            txt = f"{lab}, {dur:.1f} s" if math.isfinite(dur) else lab
        elif k == "piece":
            txt = f"first note; ends at {_t(r.nominal_end)}"
        else:
            txt = lab
        out.append(txt)
    return out


def cue_sheet_html(*, models, names, tables: dict, programme: pd.DataFrame, gap_s: float) -> str:
    """The cue sheet as one HTML string (see module docstring)."""
    several = len(names) > 1
    e = html.escape
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             "<title>Cue sheet</title>", f"<style>{_CSS}</style></head><body>", "<h1>Cue sheet</h1>"]
    total = float(programme["end"].iloc[-1]) if len(programme) else 0.0
    meta = f"{len(names)} piece{'s' if several else ''}, nominal total {_t(total)}"
    if several:
        meta += f", {gap_s:g} s between pieces"
    parts.append(f'<p class="meta">{e(meta)}. Times are nominal (at the notated tempo); '
                 "bar.beat as printed, pass 2 = repeat.</p>")
    for k, (nm, m) in enumerate(zip(names, models)):
        tab = tables[nm]
        prow = programme.iloc[k]
        parts.append('<section class="piece">')
        title = f" — {m.title}" if getattr(m, "title", "") else ""
        parts.append(f"<h2>{k + 1}. {e(nm)}{e(title)}</h2>")
        info = (f"file {m.path.name}; {len(m.measures)} bars performed; nominal {_t(prow['duration'])}"
                + (f"; starts at {_t(prow['start'])} in the programme" if several else "")
                + ("" if m.repeats_expanded else "; repeats not expanded"))
        parts.append(f'<p class="meta">{e(info)}</p>')
        if m.warnings:
            parts.append('<ul class="warn">' + "".join(f"<li>{e(w)}</li>" for w in m.warnings) + "</ul>")
        head = ["", "bar", "beat", "pass", "time"] + (["programme"] if several else []) + \
               ["kind", "what changes", "part"]
        parts.append("<table><thead><tr>" + "".join(f"<th>{e(h)}</th>" for h in head)
                     + "</tr></thead><tbody>")
        endq = tab["end_qn"].to_numpy(dtype=float)
        ends = [None] * len(tab)
        fin = [i for i, v in enumerate(endq) if math.isfinite(v)]
        if fin:
            # the bar holding the last moment of the span
            loc = m.locate([max(endq[i] - 1e-6, 0.0) for i in fin])
            for i, bar_no in zip(fin, loc["measure"].tolist()):
                ends[i] = int(bar_no)
        changes = change_text(tab, end_bars=ends)
        for r, ch in zip(tab.itertuples(index=False), changes):
            cells = ['<td class="box">\u2610</td>', f'<td class="num">{int(r.measure)}</td>',
                     f'<td class="num">{_num(r.beat, "{:.2f}").rstrip("0").rstrip(".")}</td>',
                     f'<td class="num">{int(r[3])}</td>',  # the "pass" column
                     f'<td class="num">{_t(r.nominal)}</td>']
            if several:
                cells.append(f'<td class="num">{_t(r.programme)}</td>')
            cells += [f"<td>{e(_KIND_NAMES.get(r.trial_type, r.trial_type))}</td>", f"<td>{e(ch)}</td>",
                      f"<td>{e(str(r.part))}</td>"]
            parts.append(f'<tr class="k-{e(r.trial_type)}">' + "".join(cells) + "</tr>")
        parts.append("</tbody></table></section>")
    from ..score.tempomap import tempo_settings

    st = tempo_settings()
    parts.append('<p class="meta">Nominal times assume: q = '
                 f"{st['default_bpm']:g} where a score has no tempo; rit./accel. change the tempo by "
                 f"{st['ramp_depth'] * 100:g} % towards the next mark; fermatas hold "
                 f"{st['fermata_factor']:g}× their length; tempo words get the project's "
                 "conventional BPM. Real performances differ: follow the bars.</p>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"
