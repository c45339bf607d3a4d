"""The study report: one self-contained HTML page with a panel per participant and the group figures.

What it shows
-------------
- the study's facts and every session (its performance, its physiological files, failures with
  their reason);
- **one panel per participant**: for each of their sessions and series, the before/after
  difference at every boundary (time order) with its 95 % CI, filled where the calibrated test is
  significant after BH, coloured by direction; the caption gives the share of significant
  boundaries against the participant's own chance band (``s_obs``, null 95th percentile,
  ``p_share``);
- **group figures**: the prevalence of responders (each participant's ``p_share`` against
  ``alpha``; the Bayesian prevalence MAP with its 95 % HPDI), the direction of response per
  boundary across participants who heard the same performance (every participant's ``z`` and the
  mean), and the mixed model's mean difference per boundary kind with its 95 % CI;
- the group tables and the cautions.

Conventions
-----------
Self-contained (figures embedded as PNG ``data:`` URIs, inline CSS, no script); deterministic
(:func:`stimkit.report.figure.figure_png`, no dates or hosts), so a rerun gives identical bytes.
Panels use the smallest window N; the tables hold every N.
"""

from __future__ import annotations

import base64
import math

import numpy as np
import pandas as pd

__all__ = ["write_study_report", "participant_figure", "group_figures"]

_UP, _DOWN, _NONE = "#b5452b", "#2f6f8f", "#8a96a3"


def _fig(w, h):
    from matplotlib.figure import Figure

    return Figure(figsize=(w, h), dpi=100)


def participant_figure(pid: str, tests: pd.DataFrame, summary: pd.DataFrame):
    """One participant's panel (see module notes); ``None`` when they have no tested boundary."""
    t = tests[tests["participant"] == pid] if len(tests) else tests
    if not len(t):
        return None
    n_min = int(t["N"].min())
    t = t[t["N"] == n_min]
    groups = list(t.groupby(["session", "series"], sort=True))
    fig = _fig(10.0, 1.9 * len(groups) + 0.6)
    axes = fig.subplots(len(groups), 1, squeeze=False)[:, 0]
    for ax, ((ses, series), g) in zip(axes, groups):
        g = g.sort_values("onset") if "onset" in g.columns else g
        x = np.arange(len(g))
        d = g["delta"].to_numpy(dtype=np.float64)
        lo = g["ci_low"].to_numpy(dtype=np.float64) if "ci_low" in g.columns else np.full(d.size, np.nan)
        hi = g["ci_high"].to_numpy(dtype=np.float64) if "ci_high" in g.columns else np.full(d.size, np.nan)
        sig = g["significant"].astype(str).str.lower().isin(["true", "1"]).to_numpy() \
            if "significant" in g.columns else np.zeros(d.size, bool)
        col = np.where(d > 0, _UP, np.where(d < 0, _DOWN, _NONE))
        for xi, di, a, b, c, s in zip(x, d, lo, hi, col, sig):
            if math.isfinite(a) and math.isfinite(b):
                ax.plot([xi, xi], [a, b], color=c, lw=1.0, alpha=0.8)
            if math.isfinite(di):
                ax.plot([xi], [di], marker="o", ms=4.5, color=c, mfc=c if s else "white", mew=1.0)
        ax.axhline(0.0, color="#444444", lw=0.7)
        labels = [f"m.{_txt(m)} {_txt(k)}" for m, k in zip(g.get("measure", [""] * len(g)),
                                                            g.get("trial_type", [""] * len(g)))]
        step = max(1, len(labels) // 30)
        ax.set_xticks(x[::step])
        ax.set_xticklabels(labels[::step], rotation=60, ha="right", fontsize=6)
        ax.set_xlim(-0.7, max(len(g) - 0.3, 0.7))
        cap = f"ses-{ses}, {series}, N = {n_min}"
        s = summary[(summary["participant"] == pid) & (summary["session"] == ses) & (summary["series"] == series)
                    & (summary["N"] == n_min)] if len(summary) else summary
        if len(s) and "p_share" in s.columns:
            fams = [f"{r.trial_type} {_num(r.s_obs)} vs {_num(r.null_q95)} (p {_num(r.p_share)})"
                    for r in s.itertuples(index=False) if math.isfinite(float(r.p_share))]
            cap += ": share significant vs chance 95th percentile: " + "; ".join(fams)
        ax.set_title(cap, fontsize=8, loc="left")
        ax.set_ylabel("after - before", fontsize=7)
        ax.tick_params(labelsize=7)
    fig.suptitle(f"sub-{pid}: before/after difference at each boundary (filled: significant)", fontsize=9,
                 x=0.01, ha="left")
    fig.tight_layout()
    return fig


def _txt(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "n/a"
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return str(v)


def _num(v) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return "n/a"
    return "n/a" if not math.isfinite(f) else (f"{f:.3g}" if abs(f) < 1e-3 and f != 0 else f"{f:.3f}")


def group_figures(group) -> list[tuple[str, object]]:
    """``(caption, figure)`` for the prevalence, direction and mixed-model figures that have data."""
    out = []
    pr = group.prevalence
    if len(pr):
        fig = _fig(10.0, 0.32 * len(pr) + 1.2)
        ax = fig.subplots(1, 1)
        y = np.arange(len(pr))[::-1]
        g = pr["gamma_map"].to_numpy(dtype=np.float64)
        lo, hi = pr["hpdi_low"].to_numpy(dtype=np.float64), pr["hpdi_high"].to_numpy(dtype=np.float64)
        ax.errorbar(g, y, xerr=[g - lo, hi - g], fmt="o", color=_UP, capsize=3)
        ax.set_yticks(y)
        ax.set_yticklabels([f"{r.series}, N = {r.N}, {r.trial_type}: {r.k} of {r.n} (p = {_num(r.p_binom)})"
                            for r in pr.itertuples(index=False)], fontsize=7)
        ax.set_xlim(0, 1)
        ax.set_xlabel("population prevalence of responders (MAP and 95 % HPDI)", fontsize=7)
        ax.set_title(f"responders: p_share < {group.alpha:g} within the participant (own chance band); "
                     "binomial test against alpha", fontsize=8, loc="left")
        ax.tick_params(labelsize=7)
        fig.tight_layout()
        out.append(("Prevalence of responders per boundary family: the Bayesian population prevalence "
                    "(Ince et al. 2021) with the number of responders and the binomial test.", fig))
    d = group.direction
    if len(d):
        fams = list(d.groupby(["performance", "series", "N"], sort=True))
        fams = [f for f in fams if f[0][2] == min(x[0][2] for x in fams if x[0][:2] == f[0][:2])]
        fig = _fig(10.0, 2.0 * len(fams) + 0.6)
        axes = fig.subplots(len(fams), 1, squeeze=False)[:, 0]
        for ax, ((perf, series, n_beats), g) in zip(axes, fams):
            x = np.arange(len(g))
            z = g["mean_z"].to_numpy(dtype=np.float64)
            cons = g["consistent"].astype(str).str.lower().eq("true").to_numpy()
            col = np.where(z > 0, _UP, np.where(z < 0, _DOWN, _NONE))
            ax.bar(x, z, color=col, alpha=0.7, width=0.7)
            for xi, c in zip(x[cons], z[cons]):
                ax.text(xi, c, "*", ha="center", va="bottom" if c >= 0 else "top", fontsize=9)
            ax.axhline(0, color="#444444", lw=0.7)
            labels = [f"m.{_txt(m)} {_txt(k)}" for m, k in zip(g["measure"], g["trial_type"])]
            step = max(1, len(labels) // 40)
            ax.set_xticks(x[::step])
            ax.set_xticklabels(labels[::step], rotation=60, ha="right", fontsize=6)
            ax.set_ylabel("mean z", fontsize=7)
            ax.set_title(f"{perf}, {series}, N = {n_beats}: mean z over participants per boundary "
                         "(* Wilcoxon, BH q < alpha)", fontsize=8, loc="left")
            ax.tick_params(labelsize=7)
        fig.tight_layout()
        out.append(("Direction of response across participants who heard the same performance.", fig))
    m = group.mixed
    if len(m):
        fams = list(m.groupby(["series", "N"], sort=True))
        fig = _fig(10.0, 0.35 * len(m) + 0.9 * len(fams) + 0.5)
        axes = fig.subplots(len(fams), 1, squeeze=False)[:, 0]
        for ax, ((series, n_beats), g) in zip(axes, fams):
            y = np.arange(len(g))
            e = g["estimate"].to_numpy(dtype=np.float64)
            ax.errorbar(e, y, xerr=[e - g["ci_low"].to_numpy(dtype=np.float64),
                                    g["ci_high"].to_numpy(dtype=np.float64) - e],
                        fmt="o", color="#1d2a36", capsize=3)
            ax.axvline(0, color="#444444", lw=0.7)
            ax.set_yticks(y)
            ax.set_yticklabels([f"{k} (n={n})" for k, n in zip(g["term"], g["n_boundaries"])], fontsize=7)
            ax.set_title(f"{series}, N = {n_beats}: mean after - before by boundary kind (95 % CI), "
                         "random intercept per participant", fontsize=8, loc="left")
            ax.tick_params(labelsize=7)
        fig.tight_layout()
        out.append(("Mixed model of the before/after differences by boundary kind (statsmodels MixedLM).", fig))
    return out


def _img(fig, alt: str) -> str:
    from ..report.figure import figure_png

    data = base64.b64encode(figure_png(fig)).decode("ascii")
    return f'<img alt="{_esc(alt)}" src="data:image/png;base64,{data}">'


def _esc(v) -> str:
    import html

    return html.escape(str(v), quote=True)


def write_study_report(outs, study, plan, group, tables, *, failed, folder: str) -> list:
    """Stage ``<folder>/study-report.html`` (see module notes)."""
    from .. import __version__
    from ..report.html import _CSS, _facts, _table

    tests = tables.get("boundary_tests", pd.DataFrame())
    summary = tables.get("boundary_summary", pd.DataFrame())
    sessions = pd.DataFrame([{
        "session": j.name, "performance": plan.performances[j.performance_key].ids[0],
        "clock": j.spec.sync.mode, "physiological files": ", ".join(study.show(p.file) for p in j.spec.physio) or "none",
        "status": "failed" if any(n == j.name for n, _ in failed) else "done"} for j in plan.sessions])
    facts = {"study": study.name, "participants": len(study.participants), "sessions": len(plan.sessions),
             "performances (aligned once each)": len(plan.performances),
             "sessions with physiology tables": group.n_sessions, "failed sessions": len(failed),
             "alpha (group)": group.alpha}
    body = [f"<h1>{_esc(study.name)}: study report</h1>",
            '<p class="lead">Physiology related to the music across participants and sessions.</p>',
            _facts(facts),
            "<h2>Cautions</h2>",
            "<p>A research tool, not a medical device. These statistics show association, not cause; they "
            "are exploratory (autocorrelation, multiplicity and individual differences: responses differ "
            "between participants and can go either way, so a group mean can hide or manufacture effects). "
            "Study protocols, ethics approval and clinical staff decide what is safe.</p>",
            "<h2>Sessions</h2>", _table(sessions)]
    if failed:
        body.append("<h3>Failed sessions</h3><ul class=\"warnings\">"
                    + "".join(f"<li>{_esc(n)}: {_esc(r)}</li>" for n, r in failed) + "</ul>")
    body.append("<h2>Group results</h2>")
    figs = group_figures(group)
    if not figs:
        body.append("<p>No physiology tables: no group statistics.</p>")
    for cap, fig in figs:
        body.append(f"<figure>{_img(fig, cap)}<figcaption>{_esc(cap)}</figcaption></figure>")
    for title, df in (("Prevalence", group.prevalence), ("Mixed model by boundary kind", group.mixed),
                      ("Direction consistency (boundaries with a test)",
                       group.direction[group.direction["p_wilcoxon"].notna()] if len(group.direction)
                       else group.direction)):
        if len(df):
            body.append(f"<h3>{_esc(title)}</h3>" + _table(df, max_rows=80))
    body.append("<h2>Participants</h2>")
    any_panel = False
    for row in study.participants:
        pid = row["participant_id"][4:]
        fig = participant_figure(pid, tests, summary) if len(tests) else None
        if fig is not None:
            any_panel = True
            body.append(f"<h3>sub-{_esc(pid)}</h3><figure>{_img(fig, f'sub-{pid} panel')}</figure>")
    if not any_panel:
        body.append("<p>No boundary tests to show.</p>")
    if group.warnings:
        body.append('<h2>Warnings</h2><ul class="warnings">'
                    + "".join(f"<li>{_esc(w)}</li>" for w in group.warnings) + "</ul>")
    body.append(f"<footer>stimkit {_esc(__version__)}</footer>")
    page = ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{_esc(study.name)}: study report</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")
    return [outs.write_text(f"{folder}/study-report.html", page)]
