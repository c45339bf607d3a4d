"""Studies: many participants and sessions in one command, group results, scale-out on Dask.

A study file (:mod:`.studyfile`) lists participants, the performances they heard and, per
participant and session, their recorder clock and physiological files. :func:`run_study`
(:mod:`.runner`) runs each session as an independent job over one ``concurrent.futures``
executor -- local processes, or a Dask cluster through ``Client.get_executor()`` -- aligning each
performance once (:mod:`.jobs`), skipping sessions whose inputs and settings did not change
(:mod:`.plan`, :mod:`.state`), and writes a BIDS dataset (:mod:`.layout`) with the group
statistics (:mod:`.group`) and a study report (:mod:`.report`) under ``derivatives/``.

Public API: :func:`load_study`, :func:`template_text`, :func:`run_study`, :func:`summary_lines`.
"""

from .runner import StudyResult, run_study
from .studyfile import Study, load_study, template_text

__all__ = ["Study", "StudyResult", "load_study", "run_study", "template_text", "summary_lines"]


def summary_lines(result: StudyResult) -> list[str]:
    """Short lines for people: what ran where, what was skipped, what failed, where the outputs are."""
    n = len(result.sessions)
    lines = [f"{n} session(s): {len(result.computed)} computed, {len(result.skipped)} already current, "
             f"{len(result.failed)} failed ({result.where})",
             f"performances: {result.performances_total}, analysed in this run: {result.performances_computed}"]
    g = result.group
    if g is not None and len(g.prevalence):
        found = g.prevalence[g.prevalence["k"] > 0]
        lines.append(f"prevalence: responders in {len(found)} of {len(g.prevalence)} boundary families "
                     f"(series x N x kind)")
        for r in found.itertuples(index=False):
            lines.append(f"  {r.series}, N = {r.N}, {r.trial_type}: {r.k} of {r.n} participants respond "
                         f"(binomial p = {r.p_binom:.3g}; prevalence MAP {r.gamma_map:.2f}, "
                         f"95 % HPDI {r.hpdi_low:.2f}-{r.hpdi_high:.2f})")
    if g is not None and len(g.mixed):
        sig = g.mixed[g.mixed["p"] < g.alpha]
        lines.append(f"mixed model: {len(g.mixed)} kind x family means, {len(sig)} with p < {g.alpha:g}")
    said: dict[str, list[str]] = {}
    for o in result.sessions:
        for w in o.warnings:
            said.setdefault(w, []).append(o.name)
    for w, names in said.items():  # doubts are said here, not only in the reports
        who = names[0] if len(names) == 1 else f"{len(names)} sessions"
        lines.append(f"warning ({who}): {w}")
    for w in result.warnings:
        lines.append(f"warning: {w}")
    for o in result.failed:
        lines.append(f"FAILED {o.name}: {o.reason}")
    lines.append(f"BIDS dataset in {result.out_dir}; study report: "
                 f"{result.out_dir / 'derivatives' / 'stimkit' / 'group' / 'study-report.html'}")
    return lines
