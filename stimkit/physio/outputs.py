"""Writing relate results: tidy TSVs with JSON sidecars, the run record and the figures.

What it writes (through one :class:`~stimkit.export.tables.OutputSet`, all or nothing)
---------------------------------------------------------------------------------------
``physio_values.tsv`` (every value with its artefact reason), ``boundary_tests.tsv``,
``boundary_summary.tsv``, ``changepoints_physio.tsv``, ``changepoints_music.tsv``,
``coincidence_curve.tsv``, ``coincidence_summary.tsv`` -- each with a ``.json`` sidecar that
describes every column (:data:`COLUMN_INFO`) and carries the parameters, the seeds and the
input files' SHA-256 -- plus ``relate.json`` (per series: clock matching, coverage, artefact
share and reliability, lag-1 autocorrelation, change points, warnings) and one
``forest_<participant>_<series>.png`` and ``coincidence_<participant>_<series>.png`` each.

Conventions
-----------
Tables are the concatenation over participants and series (a ``participant`` and a ``series``
column identify the rows). Input paths are written relative to the folder the command ran in (for annotate: the session
file's folder), never absolute.
Floats with 6 significant digits (times with 6 decimals); ``n/a`` for missing values.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import pandas as pd

from ..export.provenance import library_versions, sha256_file
from .artefacts import REASONS

__all__ = ["write_relate", "COLUMN_INFO", "TABLE_INFO", "relative_path", "input_records"]

#: Table name -> one-line description (the sidecar's Description).
TABLE_INFO = {
    "physio_values": "Every value of each physiological series with its artefact verdict (rules R0-R4).",
    "boundary_tests": "Analysis A: the series before vs after each score boundary, per window size "
                      "(one row per participant x series x window size x boundary).",
    "boundary_summary": "Analysis A: share of significant boundaries per family against its chance band.",
    "changepoints_physio": "Analysis B: change points of the physiological series (ruptures KernelCPD "
                           "linear = PELT l2, jump 1, penalty as stated).",
    "penalty_sweep": "Analysis B: the detector's penalty sweep (CROPS, Haynes, Eckley & Fearnhead 2017) "
                     "on each gap-free segment of the series, from 1/4 to 4 times the rule's penalty: "
                     "every optimal segmentation with its penalty range, count and cost.",
    "changepoints_music": "Analysis B: the music change points used, one row per feature x time (inside "
                          "the pieces).",
    "coincidence_curve": "Analysis B: success rate against the coincidence radius h with its null band, "
                         "per feature set, reference and null.",
    "coincidence_summary": "Analysis B: exceedance ranges and the global max-statistic test per feature "
                           "set, reference and null, with Benjamini-Hochberg across feature sets.",
}

_S = "s"
#: Column -> (description, units or None).
COLUMN_INFO = {
    "participant": ("Participant label.", None),
    "series": ("Which series: <kind>:<column> of the physiological file.", None),
    "time": ("Time on the recorder clock (same clock as the events' onset).", _S),
    "value": ("Value of the series (interval or level) as read, in the series' unit.", None),
    "accepted": ("true when no artefact rule flagged the value.", None),
    "reason": ("Artefact rule that flagged the value (R0-R4, see the sidecar's Reasons); n/a if accepted.",
               None),
    "trial_type": ("Boundary family (the events' trial_type).", None),
    "label": ("What the marking says (labels of rows at the same time joined with '; ').", None),
    "measure": ("Bar number as printed in the score.", None),
    "beat": ("Beat in the bar.", None),
    "piece": ("Piece holding the boundary.", None),
    "confidence": ("Alignment confidence of the boundary (0..1); boundaries below 0.5 are left out.", None),
    "onset": ("Time of the boundary on the recorder clock.", _S),
    "N": ("Window size: values (beats or breaths) per window, or seconds for a fixed-rate series "
          "(see window_unit).", None),
    "window_unit": ("beats (values) or s.", None),
    "n_before": ("Accepted values in the before window.", None),
    "n_after": ("Accepted values in the after window.", None),
    "mean_before": ("Mean of the before window.", "series unit"),
    "mean_after": ("Mean of the after window.", "series unit"),
    "delta": ("Difference after - before of the means.", "series unit"),
    "delta_pct": ("delta as per cent of mean_before.", "%"),
    "hl_shift": ("Hodges-Lehmann shift: median of all pairwise differences after - before.", "series unit"),
    "ci_low": ("Lower end of the 95 % interval of delta (method in ci_method).", "series unit"),
    "ci_high": ("Upper end of the 95 % interval of delta.", "series unit"),
    "ci_method": ("pseudo: from the centred differences at the pseudo-boundaries (assumes stationary "
                  "noise and an additive shift); iid: Welch's interval; bootstrap: stationary-bootstrap "
                  "percentile interval (Politis & Romano 1994; block length Politis & White 2004), used only "
                  "where the block is at most a quarter of the window.", None),
    "hedges_g": ("Hedges' g (Hedges 1981): J x delta / pooled SD, J = 1 - 3/(4(n_a+n_b)-9).", None),
    "t_welch": ("T1: Welch's t (Welch 1947), after vs before; reported, not used for decisions.", None),
    "df_welch": ("Welch-Satterthwaite degrees of freedom of T1.", None),
    "p_welch": ("Two-sided p of T1 (anti-conservative under autocorrelation).", None),
    "U": ("T2: Mann-Whitney U of the after window (Mann & Whitney 1947).", None),
    "p_mwu": ("Two-sided asymptotic p of T2 (tie and continuity corrected).", None),
    "r_rb": ("Rank-biserial correlation 2U/(n_a n_b) - 1; positive: after larger.", None),
    "rho1": ("Lag-1 autocorrelation of the gap-free series, clipped to [0, 0.95].", None),
    "n_eff": ("AR(1) effective size n(1-rho1)/(1+rho1) of the smaller window (Bayley & Hammersley 1946).",
              None),
    "t_ar1": ("T3: Welch's t with AR(1) effective sizes.", None),
    "p_ar1": ("Two-sided p of T3.", None),
    "z_null": ("(t - mean t_k) / sd t_k against the pseudo-boundary t values.", None),
    "p_cal": ("T4, primary: (1 + #{|t_k| >= |t|})/(K + 1) over K pseudo-boundaries (Phipson & Smyth 2010).",
              None),
    "q_bh": ("Adjusted p (correction in the sidecar; default Benjamini-Hochberg 1995) within the family "
             "(participant x series x window size x trial_type); in coincidence_summary across feature "
             "sets.", None),
    "significant": ("true when q_bh < alpha; the only decision flag.", None),
    "direction": ("up (after larger), down (after smaller) or none; no common sign is imposed.", None),
    "flags": ("overlap: another boundary of the family inside a window; unreliable: > 20 % artefacts.",
              None),
    "status": ("ok (tested), edge (a window leaves the piece), insufficient (< 80 % valid values), "
               "no_null (too few pseudo-boundaries fit); in analysis B: ok or too_few_* change points.",
               None),
    "B": ("Boundaries of the family that were tested (status ok).", None),
    "n_boundaries": ("Boundaries of the family inside the events.", None),
    "K": ("Pseudo-boundaries used for T4.", None),
    "pseudo_placement": ("away: pseudo-boundaries only where no boundary of the family lies in their "
                         "windows; anywhere: fallback when that left too little room.", None),
    "s_obs": ("Share of the tested boundaries with p_welch < alpha.", None),
    "null_q05": ("5th percentile of that share over the pseudo boundary sets.", None),
    "null_q50": ("Median of that share over the pseudo boundary sets.", None),
    "null_q95": ("95th percentile of that share over the pseudo boundary sets.", None),
    "p_share": ("(1 + #{s_null >= s_obs})/(R + 1).", None),
    "s_obs_q": ("Share of tested boundaries with q_bh < alpha.", None),
    "null_q95_q": ("95th percentile of the q-based share over the pseudo sets.", None),
    "p_share_q": ("(1 + #{s_null_q >= s_obs_q})/(R + 1).", None),
    "share_null": ("How the pseudo boundary sets were made: circular_shift (one offset added to all "
                   "boundary times on the concatenated pieces) or uniform.", None),
    "R": ("Number of null draws (surrogates, shifts or pseudo sets) actually used.", None),
    "n_significant": ("Boundaries with significant = true.", None),
    "n_up": ("Significant boundaries with direction up.", None),
    "n_down": ("Significant boundaries with direction down.", None),
    "chance_delta_q05": ("5th percentile of delta at the pseudo-boundaries (the forest plot's grey band).",
                         "series unit"),
    "chance_delta_q95": ("95th percentile of delta at the pseudo-boundaries.", "series unit"),
    "correction": ("Multiple-comparison method: fdr_bh, fdr_by or holm.", None),
    "alpha": ("Significance level.", None),
    "cp_index": ("Index of the first value after the change in the series (0-based).", None),
    "segment": ("Gap-free segment of the series (0-based): the one holding the change point, or swept.", None),
    "penalty": ("Penalty beta per change of the detector for that segment (bic_lrv and mbic: 2 sigma_LR^2 "
                "ln n; mbic adds sigma_LR^2 ln of each segment's length; rate:R: a penalty inside the "
                "range of the CROPS solution chosen).", "series unit squared"),
    "n_values": ("Values in the gap-free segment.", None),
    "penalty_rule": ("The rule's penalty per change for the segment (the sweep's reference).", "series unit squared"),
    "penalty_low": ("Smallest penalty at which this segmentation is optimal (within the sweep).",
                    "series unit squared"),
    "penalty_high": ("Largest penalty at which this segmentation is optimal (within the sweep).",
                     "series unit squared"),
    "factor_low": ("penalty_low / penalty_rule.", None),
    "factor_high": ("penalty_high / penalty_rule.", None),
    "n_changepoints": ("Change points of this segmentation in the segment.", None),
    "cost": ("Unpenalised l2 cost of the segmentation: sum over its pieces of length x variance.",
             "series unit squared"),
    "chosen": ("True for the segmentation the rule's penalty gives (none for mbic and rate:R).", None),
    "feature": ("Music feature (a column of the continuous file) or score event kind of the train.", None),
    "source": ("events (feature_change rows), detect (change points of the feature, 2 Hz) or score.",
               None),
    "feature_set": ("The music train: a feature, a pair a+b, all (union; events < 0.5 s apart merged), or "
                    "co-change>=k (k or more features changing within 1 s).", None),
    "reference": ("physio: S_P, share of physiological CPs with a music CP within h (primary); music: "
                  "S_M, share of music CPs with a physiological CP.", None),
    "window": ("symmetric |p - m| <= h, or music_leads 0 <= p - m - lag <= h.", None),
    "h": ("Coincidence radius.", _S),
    "n_P": ("Physiological change points inside the pieces.", None),
    "n_M": ("Music change points of the feature set inside the pieces.", None),
    "T": ("Length of the pieces together (Omega).", _S),
    "k_obs": ("Reference events with a coincidence within h.", None),
    "rate_obs": ("k_obs / number of reference events.", None),
    "null_method": ("iaaft (surrogates of the series, re-detected; default), circular_shift (music "
                    "train rotated), uniform (music times uniform on the pieces), iei_shuffle (music "
                    "inter-event intervals in random order), value_shuffle (the series' values shuffled and "
                    "re-detected; a sanity check only), none.", None),
    "q05": ("5th percentile of the null rate.", None),
    "q50": ("Median of the null rate.", None),
    "q95": ("95th percentile of the null rate.", None),
    "p_pointwise": ("(1 + #{S* >= S_obs})/(R + 1) at this h.", None),
    "p_hit": ("Analytic chance of a coincidence, 1 - (1 - w/T)^n_other (Donges et al. 2016); reported, "
              "not used for decisions.", None),
    "p_poisson": ("Analytic binomial tail P(K >= k_obs) (Donges et al. 2016).", None),
    "exceeds_q95": ("true when rate_obs > q95.", None),
    "exceedance_ranges": ("Runs of h where rate_obs > q95 (descriptive unless p_global < alpha).", None),
    "z_max": ("max over h of (S_obs - mean*) / max(sd*, 1/n_ref).", None),
    "h_at_max": ("h where z_max is reached.", _S),
    "p_global": ("Global max-statistic test over h: (1 + #{Z*_max >= Z_max})/(R + 1) (Myllymaki et al. "
                 "2017).", None),
}


def relative_path(path, base) -> str:
    """``path`` relative to ``base`` with forward slashes (never absolute)."""
    return Path(os.path.relpath(Path(path).resolve(), Path(base).resolve())).as_posix()


def input_records(inputs: dict, base) -> dict:
    """Role -> {path (relative to ``base``), sha256, bytes}."""
    return {role: {"path": relative_path(p, base), "sha256": sha256_file(p), "bytes": Path(p).stat().st_size}
            for role, p in sorted(inputs.items())}


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "-", str(text)).strip("-") or "series"


def _sidecar(name: str, table: pd.DataFrame, *, common: dict) -> dict:
    cols = {}
    for c in table.columns:
        desc, unit = COLUMN_INFO.get(c, ("", None))
        entry = {"Description": desc}
        if unit:
            entry["Units"] = unit
        cols[c] = entry
    out = {"Description": TABLE_INFO.get(name, name), "Columns": cols}
    if name == "physio_values":
        out["Reasons"] = REASONS
    out.update(common)
    return out


_FORMATS = {"time": "%.6f", "onset": "%.6f", "h": "%.1f"}


#: The tables written by :func:`write_relate` (each as ``.tsv`` and ``.json``), in order.
TABLE_NAMES = ("physio_values", "boundary_tests", "boundary_summary", "changepoints_physio", "penalty_sweep",
               "changepoints_music", "coincidence_curve", "coincidence_summary")


def write_relate(outs, results, *, inputs: dict, paths_base=None, prefix: str = "", command=None,
                 figures: bool = True, figures_out: dict | None = None) -> list[Path]:
    """Stage every relate output of ``results`` (a list of RelateResult) in ``outs``.

    Input paths are written relative to ``paths_base`` (default the current folder; annotate
    passes the session file's folder, so the paths read as written in the session file).

    ``figures_out``, when given, receives ``(participant, series) -> {"forest": png,
    "coincidence": png}`` for a report page to embed."""
    from .. import __version__

    written = []
    names = list(TABLE_NAMES)
    key = {"physio_values": "beats"}
    ins = input_records(inputs, paths_base if paths_base is not None else Path.cwd())  # relative paths
    settings = results[0].meta["settings"] if results else {}
    seeds = {f"{r.participant}/{r.series_name}": r.meta["seed"] for r in results}
    software = {"stimkit": __version__, "libraries": library_versions(
        ("numpy", "scipy", "pandas", "statsmodels", "ruptures", "neurokit2", "matplotlib"))}
    common = {"Parameters": settings, "Seeds": seeds, "Inputs": ins, "Software": software}
    for name in names:
        parts = [r.tables[key.get(name, name)] for r in results if key.get(name, name) in r.tables]
        parts = [p for p in parts if len(p)]
        if not parts:
            tab = next((r.tables[key.get(name, name)] for r in results if key.get(name, name) in r.tables), None)
            if tab is None:
                continue
            table = tab
        else:
            table = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]
        fmt = {c: f for c, f in _FORMATS.items() if c in table.columns}
        written.append(outs.write_tsv(f"{prefix}{name}.tsv", table, float_format="%.6g", column_formats=fmt))
        written.append(outs.write_json(f"{prefix}{name}.json", _sidecar(name, table, common=common)))
    base = paths_base if paths_base is not None else Path.cwd()
    command = [relative_path(c, base) if os.path.isabs(str(c)) else str(c) for c in command] if command else None
    record = {
        "Description": "stimkit relate: physiological series against the music (research statistics; "
                       "association, not causation; not a clinical tool).",
        "Command": command,
        "Series": [{k: v for k, v in r.meta.items() if k not in ("settings", "source_path")}
                   | {"warnings": list(r.warnings)} for r in results],
        **common,
    }
    written.append(outs.write_json(f"{prefix}relate.json", record))
    if figures:
        from .figures import coincidence_figure, forest_figure

        for r in results:
            tag = f"{_safe(r.participant)}_{_safe(r.series_name)}"
            unit = r.meta.get("unit", "")
            title = f"participant {r.participant}, {r.series_name} ({r.meta.get('source', '')})"
            figs = {}
            bt = r.tables.get("boundary_tests")
            if bt is not None and len(bt):
                figs["forest"] = forest_figure(bt, r.tables["boundary_summary"], title=title, unit=unit)
                written.append(outs.write_bytes(f"{prefix}forest_{tag}.png", figs["forest"]))
            cc = r.tables.get("coincidence_curve")
            if cc is not None and len(cc):
                png = coincidence_figure(cc, r.tables["coincidence_summary"], title=title)
                if png is not None:
                    figs["coincidence"] = png
                    written.append(outs.write_bytes(f"{prefix}coincidence_{tag}.png", png))
            if figures_out is not None:
                figures_out[(r.participant, r.series_name)] = figs
    return written
