"""Short lines for people about relate results (the CLI prints them; the library never does).

Per series: how its clock was matched, coverage and artefact share, then analysis A (per
family and window size with a tested boundary: significant of tested, share vs chance) and
analysis B (per feature set with p_global < 0.1 or the union: exceedance ranges and p_global),
then the warnings and the files written.
"""

from __future__ import annotations

import numpy as np

__all__ = ["summary_lines", "series_lines", "sweep_text"]


def _fmt_p(p) -> str:
    return "n/a" if p is None or not np.isfinite(p) else f"{p:.3f}"


def sweep_text(sweep) -> str:
    """One sentence on the penalty sweep (CROPS): how many change points from 4x to 1/4x the
    penalty, summed over the segments; empty when there is none."""
    if sweep is None or not len(sweep):
        return ""
    few = int(sweep.groupby("segment")["n_changepoints"].min().sum())
    many = int(sweep.groupby("segment")["n_changepoints"].max().sum())
    return (f"Penalty sweep (CROPS, 1/4 to 4 times the penalty): {few} to {many} change points "
            f"(penalty_sweep.tsv); power, unlike the null, depends on this choice.")


def series_lines(r) -> list[str]:
    """Lines for one RelateResult."""
    m = r.meta
    out = [f"participant {r.participant}, {r.series_name} from {m.get('source')}: {m.get('n_values')} values, "
           f"covers {m.get('coverage', 0):.0%} of the music, {m.get('artefact_share', 0):.1%} flagged "
           f"({m.get('reliability')}), lag-1 autocorrelation {m.get('rho1', 0):.2f}",
           f"  clock: {m.get('clock')}"]
    bs = r.tables.get("boundary_summary")
    if bs is not None and len(bs):
        for row in bs.itertuples(index=False):
            if not row.B:
                continue
            out.append(f"  boundaries {row.trial_type}, {row.N:g} {row.window_unit}: {row.n_significant} of "
                       f"{row.B} significant (calibrated, BH; {row.n_up} up, {row.n_down} down); share "
                       f"p<.05 {row.s_obs:.2f} vs chance 95th pct {row.null_q95:.2f} (p_share "
                       f"{_fmt_p(row.p_share)})")
    cs = r.tables.get("coincidence_summary")
    if cs is not None and len(cs):
        main = cs[(cs["reference"] == "physio") & (cs["null_method"].isin(["iaaft", "none"]))]
        pairs = main["feature_set"].str.contains("+", regex=False)
        shown = main[(main["feature_set"] == "all") | ((main["p_global"] < 0.1) & ~pairs)]
        n_p = int(main["n_P"].iloc[0]) if len(main) else 0
        out.append(f"  change points: {n_p} in the series inside the pieces; {len(main)} music feature "
                   f"set(s) tested")
        for row in shown.itertuples(index=False):
            sig = " SIGNIFICANT" if row.significant is True else ""
            out.append(f"  coincidence {row.feature_set} ({row.n_M} music CPs): above the null 95th pct at "
                       f"{row.exceedance_ranges}; p_global {_fmt_p(row.p_global)}, q {_fmt_p(row.q_bh)}{sig}")
        sweep = sweep_text(r.tables.get("penalty_sweep"))
        if sweep:
            out.append(f"  {sweep}")
        n_pairs = int(pairs.sum())
        if n_pairs:
            n_sig = int(main.loc[pairs, "significant"].map(lambda v: v is True).sum())
            out.append(f"  feature pairs: {n_sig} of {n_pairs} significant (coincidence_summary.tsv)")
    return out


def summary_lines(run) -> list[str]:
    """Lines for a :class:`stimkit.physio.inputs.RelateRun`."""
    lines = []
    for r in run.results:
        lines.extend(series_lines(r))
    for w in run.warnings:
        lines.append(f"warning: {w}")
    lines.append("research statistics: association, not causation; not a clinical tool (see README, Cautions)")
    if run.out_dir is not None:
        lines.append(f"outputs in {run.out_dir}:")
        lines.extend(f"  {p.name}" for p in sorted(run.written, key=lambda q: q.name))
    return lines
