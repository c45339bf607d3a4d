"""The study's last step: combine the finished sessions into group results and dataset files.

:func:`finish_study` reads the per-participant physiology tables of every finished session (in
``derivatives/stimkit/sub-*/ses-*/``), computes the group statistics (:mod:`.group`), and writes
in one transaction the dataset-level BIDS files (:mod:`.layout`), the group tables, the study
report (:mod:`.report`) and ``derivatives/stimkit/study.json`` (the study's provenance: the study
file's hash, the settings, and each session's key, performance and files). Its outputs depend
only on the sessions' files and the study's settings, so a rerun gives identical bytes; when none
of those changed since the last run (its key, over the provenance and every finished session's
file hashes, is the one in ``.stimkit-study/finish.json``) and its files are intact, the files are
left as they are: the group statistics are still computed for the summary, the figures are not
drawn again.
"""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd

from . import state
from .layout import DERIVATIVES, derivative_dir, group_dir, write_dataset_files

__all__ = ["finish_study", "collect_tables"]


def collect_tables(study, plan, outcomes, *, out_root: Path) -> dict[str, pd.DataFrame]:
    """The physiology tables of every finished session, stacked, with identifier columns
    ``participant``, ``session``, ``performance``, ``series`` in front (empty tables when none)."""
    from .physio_bridge import TABLES, table_file_name

    frames: dict[str, list[pd.DataFrame]] = {t: [] for t in TABLES}
    ok = {o.name for o in outcomes if o.status != "failed"}
    for job in plan.sessions:
        if job.name not in ok:
            continue
        s = job.spec
        perf_id = plan.performances[job.performance_key].ids[0]
        rec = state.read_session_record(state.session_record_file(out_root, job.base)) or {"files": {}}
        for p in s.physio:
            for t in TABLES:
                rel = (derivative_dir(Path("."), s) / table_file_name(s, p, t)).as_posix()
                if rel not in rec["files"]:
                    continue
                df = pd.read_csv(Path(out_root) / rel, sep="\t", na_values="n/a", keep_default_na=False)
                ids = pd.DataFrame({"participant": s.participant, "session": s.session, "performance": perf_id,
                                    "series": p.label or p.kind or "series"}, index=df.index)
                df = df.drop(columns=[c for c in ids.columns if c in df.columns])
                frames[t].append(pd.concat([ids, df], axis=1))
    return {t: (pd.concat(v, ignore_index=True) if v else pd.DataFrame()) for t, v in frames.items()}


def _clean_reason(text: str, roots) -> str:
    for r in roots:
        text = text.replace(str(r) + os.sep, "").replace(str(r), ".")
    return text


def finish_study(study, plan, outcomes, *, out_root: Path, command=None):
    """Write the dataset-level files, group results, study report and study provenance.

    Returns ``(written paths, GroupResult, warnings)``.
    """
    from .. import __version__
    from ..export.tables import OutputSet
    from .group import group_results, write_group
    from .report import write_study_report

    tables = collect_tables(study, plan, outcomes, out_root=out_root)
    group = group_results(tables, alpha=study.group["alpha"])
    listed = {(j.spec.participant, j.spec.session) for j in plan.sessions}
    stale = sorted(f"{d.parent.name}/{d.name}" for d in Path(out_root).glob("sub-*/ses-*")
                   if d.is_dir() and (d.parent.name[4:], d.name[4:]) not in listed)
    if stale:
        group.warnings.append(f"{len(stale)} session folder(s) in the output are not in the study file "
                              f"({', '.join(stale[:5])}{', ...' if len(stale) > 5 else ''}); remove them or "
                              "choose another output folder, or BIDS tools will count them")
    failed = [(o.name, _clean_reason(o.reason, (out_root, study.root))) for o in outcomes if o.status == "failed"]
    g_rel = group_dir(out_root).relative_to(out_root).as_posix()
    inputs = {}
    if study.source is not None:
        from ..export.provenance import sha256_file

        inputs["study_file"] = {"path": study.show(study.source), "sha256": sha256_file(study.source)}
    prov = {
        "software": {"stimkit": __version__},
        "command": [str(c) for c in (command or ["stimkit", "study", inputs.get("study_file", {}).get("path", "")])],
        "inputs": inputs,
        "settings": {"name": study.name, "task": study.task, "seed": study.seed, "analysis": study.analysis,
                     "group": study.group},
        "performances": [{"ids": p.ids, "key": k, "recording": study.show(p.session.recording),
                          "inputs": p.inputs} for k, p in sorted(plan.performances.items(), key=lambda kv: kv[1].ids)],
        "sessions": [{"name": j.name, "performance": plan.performances[j.performance_key].ids[0], "key": j.key,
                      "seed": j.seed, "inputs": j.inputs} for j in plan.sessions],
        "sessions_failed": [{"name": n, "reason": r} for n, r in failed],
        "warnings": list(group.warnings),
    }
    key = _finish_key(study, plan, outcomes, prov, out_root=out_root)
    record = state.finish_record_file(out_root)
    if state.is_current_record(out_root, record, key):
        done = state.read_session_record(record) or {"files": {}}
        return [Path(out_root) / rel for rel in done["files"]], group, list(group.warnings)
    with OutputSet(out_root) as outs:
        write_dataset_files(outs, study)
        write_group(outs, group, folder=g_rel)
        write_study_report(outs, study, plan, group, tables, failed=failed, folder=g_rel)
        outs.write_json((DERIVATIVES / "study.json").as_posix(), prov)
    state.write_session_record(record, key=key, out_root=out_root, files=outs.committed)
    return list(outs.committed), group, list(group.warnings)


def _finish_key(study, plan, outcomes, prov: dict, *, out_root: Path) -> str:
    """The key of the study's last step: its provenance (settings, study file hash, every job's key,
    failures, command, version), the dataset-level facts and the files every finished session wrote."""
    from .plan import _key

    ok = {o.name for o in outcomes if o.status != "failed"}
    files = {}
    for job in plan.sessions:
        if job.name in ok:
            rec = state.read_session_record(state.session_record_file(out_root, job.base)) or {"files": {}}
            files[job.name] = rec["files"]
    facts = {"name": study.name, "task": study.task, "authors": list(study.authors or []),
             "license": study.license, "participants": study.participants}
    return _key({"provenance": prov, "dataset": facts, "session_files": files})
