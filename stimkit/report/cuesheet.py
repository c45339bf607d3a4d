"""The cue sheet: a printable, self-contained HTML page of the planned boundaries.

What it computes
----------------
:func:`cue_sheet_html` renders, per piece, every boundary with its bar, beat, nominal time (and
programme time when several pieces are planned) and *what changes* ("p -> mf", "q 84 -> 97",
"G major -> D major"), with an empty box to tick during a live session. One file, inline CSS,
no scripts, no external resources; A4/Letter friendly in print (table headers repeat, rows are
not split across pages).

Conventions
-----------
- Times are nominal (notated tempo) in ``m:ss.s``; the text is escaped; the output is
  deterministic (no dates).
- Only real changes are listed: a marking that restates what is already in force (``p`` where
  ``p`` holds, the same metronome mark, the same key) is left out of the sheet; the boundary
  tables keep it.
- Beats are written the way players count them (:func:`beat_text`): the beat number plus a
  simple fraction of a beat (``2½``, ``1¼``, ``3⅔``), ``end`` for a mark on the closing
  barline, and, where the position is no simple fraction of a beat, ``between 1 and 2``.
- Rows at the same moment come in reading order (:data:`READING_ORDER`): what closes the
  previous bar (repeat end, double bar), then what a player meets at the new bar from left to
  right: rehearsal/section marks, key and time signatures, tempo, dynamics, accents, fermatas.
- Only plain-language reading remarks reach the sheet; a remark that still carries a
  library's raw wording (class names, object reprs, exception text) is counted, not shown
  (:func:`plain_remarks`).
- The header names exactly the columns shown: ``pass`` only when a bar is played twice,
  ``programme`` only with several pieces, ``part`` only when a marking belongs to some parts.
"""

from __future__ import annotations

import html
import math
import re

import pandas as pd

from ..errors import InputError

__all__ = ["cue_sheet_html", "change_text", "beat_text", "plain_remarks", "parse_kinds",
           "READING_ORDER", "CUE_KINDS"]

#: Boundary kinds a cue sheet can show (the score levels), in reading order at one moment.
READING_ORDER = ("piece", "section", "key", "meter", "tempo", "tempo_change", "dynamic", "hairpin",
                 "accent", "fermata", "pause")
CUE_KINDS = READING_ORDER

_KIND_NAMES = {
    "piece": "piece", "dynamic": "dynamic", "hairpin": "hairpin", "accent": "accent",
    "tempo": "tempo", "tempo_change": "tempo change", "fermata": "fermata", "key": "key",
    "meter": "meter", "section": "section", "pause": "pause",
}

#: Marks printed on the closing barline of a bar: read before anything on the next bar.
_BARLINE_LABELS = ("repeat end", "double bar", "final bar")

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


def parse_kinds(text: str) -> list[str]:
    """``"dynamic,tempo"`` -> ``["dynamic", "tempo"]``, checked against :data:`CUE_KINDS`.

    Raises :class:`~stimkit.errors.InputError` naming the unknown kinds and the known ones.
    """
    kinds = [k.strip().replace("-", "_").replace(" ", "_") for k in str(text).split(",") if k.strip()]
    unknown = [k for k in kinds if k not in CUE_KINDS]
    if not kinds or unknown:
        what = f"unknown kind(s) {', '.join(unknown)}" if unknown else "no kind given"
        raise InputError(f"--kinds: {what}; choose from {','.join(CUE_KINDS)}")
    return list(dict.fromkeys(kinds))


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


#: Fractions of a beat players name (halves, thirds, quarters, sixths, eighths), as glyphs.
_FRACTIONS = {(1, 2): "\u00bd", (1, 3): "\u2153", (2, 3): "\u2154", (1, 4): "\u00bc", (3, 4): "\u00be",
              (1, 6): "\u2159", (5, 6): "\u215a", (1, 8): "\u215b", (3, 8): "\u215c", (5, 8): "\u215d",
              (7, 8): "\u215e"}


def beat_text(beat: float, *, last_beat: float | None = None, tol: float = 1e-3) -> str:
    """The beat as a player reads it: ``"2"``, ``"2½"``, ``"1¾"``, ``"end"``, ``"between 1 and 2"``.

    ``last_beat`` is the number of the bar's last beat (e.g. 4 in 4/4); a position at or after
    ``last_beat + 1`` is a mark on the closing barline (``"end"``).
    """
    try:
        b = float(beat)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(b):
        return ""
    if last_beat is not None and math.isfinite(last_beat) and b >= last_beat + 1 - tol:
        return "end"
    whole = math.floor(b + tol)
    frac = b - whole
    if abs(frac) <= tol:
        return str(int(whole))
    for (n, d), glyph in sorted(_FRACTIONS.items(), key=lambda kv: (kv[0][1], kv[0][0])):
        if abs(frac - n / d) <= tol:
            return f"{int(whole)}{glyph}"
    return f"between {int(whole)} and {int(whole) + 1}"


_RAW = re.compile(r"music21|<[A-Za-z_.]+[ >]|object at 0x|Traceback|Exception|Error\b|\.py\b|"
                  r"\b[a-z]+[A-Z][A-Za-z]*\(|\{'|\[\'")


def plain_remarks(warnings) -> tuple[list[str], int]:
    """``(plain, n_raw)``: the warnings written in plain words, and how many still carry a
    library's raw wording (class or module names, object reprs, exception text)."""
    plain, raw = [], 0
    for w in warnings or []:
        text = " ".join(str(w).split())
        if not text:
            continue
        if _RAW.search(text):
            raw += 1
        else:
            plain.append(text)
    return plain, raw


def change_text(table: pd.DataFrame, *, end_bars=None) -> list[str | None]:
    """For each row, a short 'what changes' text using the marking in force before it.

    ``end_bars`` (optional, one per row) is the printed bar where a spanning marking ends.
    A row that restates what is in force (a dynamic, metronome mark, key or meter equal to the
    previous one of its kind) gets ``None``: it is no change.
    """
    prev: dict[str, object] = {}
    out: list[str | None] = []
    if end_bars is None:
        end_bars = [None] * len(table)
    for r, end_bar in zip(table.itertuples(index=False), end_bars):
        k, lab, val = r.trial_type, str(r.label), r.value
        if k == "dynamic":
            before = prev.get(k)
            txt = None if before == lab else (f"{before} \u2192 {lab}" if before is not None else f"starts {lab}")
            prev[k] = lab
        elif k in ("tempo", "tempo_change"):
            bpm = _num(val, "{:.0f}")
            before, before_label = prev.get("bpm"), prev.get("tempo_label")
            ramp = k == "tempo_change" and isinstance(r.end_qn, float) and math.isfinite(r.end_qn)
            if bpm and before == bpm and not ramp:
                txt = None if before_label == lab else f"{lab}; q stays {bpm}"
            elif bpm:
                txt = f"q {before} \u2192 {bpm}" if before is not None else f"q = {bpm}"
                if ramp:
                    txt += f" (gradually, until {_t(r.nominal_end)})"
            else:
                txt = lab
            if bpm:
                prev["bpm"] = bpm
            prev["tempo_label"] = lab
        elif k in ("key", "meter"):
            before = prev.get(k)
            txt = None if before == lab else (f"{before} \u2192 {lab}" if before is not None else lab)
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


def _reading_order(tab: pd.DataFrame) -> pd.DataFrame:
    """Rows sorted by position, same-moment rows in reading order (see module notes)."""
    rank = {k: i for i, k in enumerate(READING_ORDER)}
    barline = tab["label"].astype(str).isin(_BARLINE_LABELS) & (tab["trial_type"] == "section")
    key = pd.DataFrame({
        "q": tab["score_qn"].astype(float).round(6).to_numpy(),
        "bar": (~barline).astype(int).to_numpy(),        # closing-barline marks first
        "kind": tab["trial_type"].map(lambda k: rank.get(k, len(rank))).to_numpy(),
        "row": range(len(tab)),
    })
    order = key.sort_values(["q", "bar", "kind", "row"], kind="mergesort")["row"].to_numpy()
    return tab.iloc[order].reset_index(drop=True)


def _last_beats(m, tab: pd.DataFrame) -> list[float | None]:
    """Number of the last beat of each row's bar (None when the bar is not found)."""
    ms = getattr(m, "measures", None)
    if ms is None or not len(ms) or not {"measure", "pass", "duration_qn", "beat_qn"} <= set(ms.columns):
        return [None] * len(tab)
    first = ms["first_beat"] if "first_beat" in ms.columns else pd.Series(1.0, index=ms.index)
    last = first.astype(float) - 1 + ms["duration_qn"].astype(float) / ms["beat_qn"].astype(float)
    lut = {}
    for (bar, pas), v in zip(zip(ms["measure"], ms["pass"]), last):
        lut.setdefault((int(bar), int(pas)), float(v))
    return [lut.get((int(b), int(p))) for b, p in zip(tab["measure"], tab["pass"])]


def cue_sheet_html(*, models, names, tables: dict, programme: pd.DataFrame, gap_s: float,
                   kinds=None) -> str:
    """The cue sheet as one HTML string (see module notes).

    ``kinds`` (optional) limits the rows to these boundary kinds; what changes is still worked
    out from every marking, so ``--kinds dynamic`` shows ``p -> f`` even across hidden rows.
    """
    several = len(names) > 1
    shown = set(kinds) if kinds else None
    e = html.escape
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             "<title>Cue sheet</title>", f"<style>{_CSS}</style></head><body>", "<h1>Cue sheet</h1>"]
    total = float(programme["end"].iloc[-1]) if len(programme) else 0.0
    meta = f"{len(names)} piece{'s' if several else ''}, nominal total {_t(total)}"
    if several:
        meta += f", {gap_s:g} s between pieces"
    if shown:
        meta += f"; showing only {', '.join(_KIND_NAMES.get(k, k) for k in READING_ORDER if k in shown)}"
    parts.append(f'<p class="meta">{e(meta)}. Times are nominal (at the notated tempo), m:ss.s. '
                 "Bars as printed; beats counted in the bar's beat unit, with fractions of a beat "
                 "(2\u00bd is halfway through beat 2; end is the closing barline). Markings that "
                 "restate what is already in force are left out.</p>")
    for k, (nm, m) in enumerate(zip(names, models)):
        tab = _reading_order(tables[nm])
        prow = programme.iloc[k]
        parts.append('<section class="piece">')
        title = f" — {m.title}" if getattr(m, "title", "") else ""
        parts.append(f"<h2>{k + 1}. {e(nm)}{e(title)}</h2>")
        info = (f"file {m.path.name}; {len(m.measures)} bars performed; nominal {_t(prow['duration'])}"
                + (f"; starts at {_t(prow['start'])} in the programme" if several else "")
                + ("" if m.repeats_expanded else "; repeats not expanded"))
        parts.append(f'<p class="meta">{e(info)}</p>')
        plain, n_raw = plain_remarks(m.warnings)
        if n_raw:
            plain.append(f"{n_raw} further remark{'s' if n_raw != 1 else ''} from reading the score file "
                         f"(listed in {nm}.boundaries.json)")
        if plain:
            parts.append('<ul class="warn">' + "".join(f"<li>{e(w)}</li>" for w in plain) + "</ul>")
        endq = tab["end_qn"].to_numpy(dtype=float)
        ends = [None] * len(tab)
        fin = [i for i, v in enumerate(endq) if math.isfinite(v)]
        if fin:
            # the bar holding the last moment of the span
            loc = m.locate([max(endq[i] - 1e-6, 0.0) for i in fin])
            for i, bar_no in zip(fin, loc["measure"].tolist()):
                ends[i] = int(bar_no)
        changes = change_text(tab, end_bars=ends)
        last = _last_beats(m, tab)
        keep = [ch is not None and (shown is None or r.trial_type in shown)
                for r, ch in zip(tab.itertuples(index=False), changes)]
        rows = [(r, ch, lb) for r, ch, lb, kp in zip(tab.itertuples(index=False), changes, last, keep) if kp]
        with_pass = any(int(r[3]) > 1 for r, _, _ in rows)
        with_part = any(str(r.part) != "all" for r, _, _ in rows)
        head = ["\u2713", "bar", "beat"] + (["pass"] if with_pass else []) + ["time"] + \
               (["programme"] if several else []) + ["kind", "what changes"] + (["part"] if with_part else [])
        if not rows:
            parts.append('<p class="meta">No boundary of the chosen kinds.</p></section>')
            continue
        parts.append("<table><thead><tr>" + "".join(f"<th>{e(h)}</th>" for h in head)
                     + "</tr></thead><tbody>")
        for r, ch, lb in rows:
            cells = ['<td class="box">\u2610</td>', f'<td class="num">{int(r.measure)}</td>',
                     f'<td class="num">{e(beat_text(r.beat, last_beat=lb))}</td>']
            if with_pass:
                cells.append(f'<td class="num">{int(r[3])}</td>')  # the "pass" column
            cells.append(f'<td class="num">{_t(r.nominal)}</td>')
            if several:
                cells.append(f'<td class="num">{_t(r.programme)}</td>')
            cells += [f"<td>{e(_KIND_NAMES.get(r.trial_type, r.trial_type))}</td>", f"<td>{e(ch)}</td>"]
            if with_part:
                cells.append(f"<td>{e(str(r.part))}</td>")
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
