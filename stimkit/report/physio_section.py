"""The report's "Physiology and music" section: relate results as one HTML fragment.

What it shows
-------------
The cautions first (research statistics, not a clinical tool; association, not causation;
autocorrelation, multiplicity, individual differences), then per participant x series: how its
times were put on the recorder clock, coverage, artefact share and verdict; analysis A (the
share of significant boundaries per family and window size against its chance band, and every
boundary flagged significant), with the forest plot; analysis B (per feature set: change-point
counts, the h ranges above the null's 95th percentile and the global p), with the band plot.

Conventions
-----------
Self-contained like the page it goes into: figures are embedded as ``data:`` URIs, every text
from the data is escaped, numbers in a fixed format. The page adds the heading
(:data:`SECTION_HEADING`) through its ``extra_sections`` hook.
"""

from __future__ import annotations

import base64
import html
import math

__all__ = ["physio_section_html", "CAUTION_TEXT", "SECTION_HEADING"]

#: The section's heading (the page adds the ``<h2>``).
SECTION_HEADING = "Physiology and music"

CAUTION_TEXT = (
    "Research statistics, not a clinical tool: these numbers describe one recording and carry no "
    "diagnostic, risk or device meaning. They show association, not causation. Beat-to-beat series "
    "are autocorrelated, so naive before/after tests reject far too often; only the calibrated test "
    "(pseudo-boundaries in the participant's own series) and the surrogate nulls set the flags. Many "
    "things are tested at once (boundaries, window sizes, families, feature sets, the h scan): read "
    "the adjusted values and the global test, and report everything tested. Responses differ between "
    "people and may go either way; results are per participant. Breathing, movement, drugs, pacing "
    "and the setting confound these series. Study protocols, ethics approval and clinical staff "
    "decide what is safe.")


def _e(v) -> str:
    return html.escape(str(v), quote=True)


def _n(v, fmt="{:.3f}") -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return _e(v)
    return "n/a" if not math.isfinite(f) else fmt.format(f)


def _table(head: list[str], rows: list[list[str]]) -> str:
    if not rows:
        return "<p>none</p>"
    out = ["<table><thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr></thead><tbody>"]
    for r in rows:
        out.append("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def _img(png: bytes | None, alt: str) -> str:
    if not png:
        return ""
    b = base64.b64encode(png).decode("ascii")
    return f'<figure><img alt="{_e(alt)}" src="data:image/png;base64,{b}"></figure>'


def physio_section_html(results, *, figures: dict | None = None) -> str:
    """The section (module notes) for a list of RelateResult; ``figures`` maps
    ``(participant, series)`` to ``{"forest": png, "coincidence": png}``."""
    figures = figures or {}
    parts = [f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION_TEXT)}</p>']
    for r in results:
        m = r.meta
        parts.append(f"<h3>Participant {_e(r.participant)}: {_e(r.series_name)} "
                     f"({_e(m.get('source', ''))})</h3>")
        parts.append(
            '<dl class="facts">'
            f"<dt>clock</dt><dd>{_e(m.get('clock', ''))}</dd>"
            f"<dt>values</dt><dd>{_e(m.get('n_values'))} ({_e(m.get('unit'))})</dd>"
            f"<dt>coverage of the music</dt><dd>{_n(100 * m.get('coverage', float('nan')), '{:.0f}')} %</dd>"
            f"<dt>artefacts</dt><dd>{_n(100 * m.get('artefact_share', float('nan')), '{:.1f}')} % flagged "
            f"({_e(m.get('reliability'))})</dd>"
            f"<dt>lag-1 autocorrelation</dt><dd>{_n(m.get('rho1'), '{:.2f}')}</dd>"
            "</dl>")
        for w in r.warnings:
            parts.append(f'<p class="more">warning: {_e(w)}</p>')
        bs = r.tables.get("boundary_summary")
        bt = r.tables.get("boundary_tests")
        if bs is not None and len(bs):
            parts.append("<p>Boundary windows (analysis A): after minus before per boundary; significance from "
                         "the calibrated test (pseudo-boundaries) with Benjamini-Hochberg per family; the "
                         "share of boundaries with naive p &lt; .05 against the same share at shifted "
                         "boundary sets.</p>")
            rows = [[_e(x.trial_type), f"{x.N:g} {_e(x.window_unit)}", str(x.B), str(x.n_significant),
                     f"{x.n_up} / {x.n_down}", _n(x.s_obs, "{:.2f}"),
                     f"{_n(x.null_q05, '{:.2f}')}-{_n(x.null_q95, '{:.2f}')}", _n(x.p_share)]
                    for x in bs.itertuples(index=False) if x.B]
            parts.append(_table(["family", "window", "tested", "significant", "up / down", "share p<.05",
                                 "chance 5-95 %", "p_share"], rows))
            if bt is not None and len(bt):
                sig = bt[bt["significant"].map(lambda v: v is True)]
                rows = [[_n(x.onset, "{:.3f}"), _e(x.trial_type), _e(x.label), _n(x.measure, "{:.0f}"), f"{x.N:g}",
                         _n(x.delta, "{:.1f}"), f"{_n(x.ci_low, '{:.1f}')} to {_n(x.ci_high, '{:.1f}')}",
                         _n(x.p_cal), _n(x.q_bh), _e(x.direction)] for x in sig.itertuples(index=False)]
                parts.append("<p>Significant boundaries:</p>")
                parts.append(_table(["onset (s)", "family", "label", "measure", "window", "delta",
                                     "95 % interval", "p_cal", "q", "direction"], rows))
        fig = figures.get((r.participant, r.series_name), {})
        parts.append(_img(fig.get("forest"), f"forest plot, participant {r.participant}"))
        cs = r.tables.get("coincidence_summary")
        if cs is not None and len(cs):
            main = cs[(cs["reference"] == "physio")]
            main = main[main["null_method"].isin(["iaaft", "none"])]
            n_p = int(main["n_P"].iloc[0]) if len(main) else 0
            parts.append(f"<p>Change-point coincidence (analysis B): {n_p} change point(s) of the series "
                         f"inside the pieces; the share of them with a music change point within h, against "
                         f"IAAFT surrogates of the series re-detected with the same rule. Pairs of features "
                         f"are in coincidence_summary.tsv.</p>")
            single = main[~main["feature_set"].str.contains("+", regex=False)]
            rows = [[_e(x.feature_set), str(x.n_M), _e(x.exceedance_ranges), _n(x.z_max, "{:.2f}"),
                     _n(x.p_global), _n(x.q_bh), "yes" if x.significant is True else "no",
                     _e(x.status)] for x in single.itertuples(index=False)]
            parts.append(_table(["feature set", "music CPs", "above null 95th pct", "z_max", "p_global",
                                 "q", "significant", "status"], rows))
            from ..physio.summary import sweep_text

            sweep = sweep_text(r.tables.get("penalty_sweep"))
            if sweep:
                parts.append(f"<p>{_e(sweep)}</p>")
        parts.append(_img(fig.get("coincidence"), f"coincidence curves, participant {r.participant}"))
    return "\n".join(parts)
