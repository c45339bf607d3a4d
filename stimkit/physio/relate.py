"""One participant's series against the music: :func:`relate` runs analyses A and B.

What it does
------------
1. Checks that the series covers at least 95 % of Omega (the union of the pieces) and flags
   artefacts (:mod:`.artefacts`); the share of flagged values is reported (> 5 % warns, > 20 %
   marks the series ``unreliable``).
2. Analysis A (:mod:`.windows`) for every boundary family and window size.
3. Analysis B (:mod:`.coincidence`): change points of the gap-free series against the music
   change points, with IAAFT surrogates (re-detected with the same rule) and circular shifts.

Conventions
-----------
Times in seconds on the recorder clock (the events' ``onset``). Seeds: the root
:class:`numpy.random.SeedSequence` spawns one child per analysis step (A pseudo-boundaries and
share null per family and window size, B surrogates, B shifts); the surrogate child spawns one
grandchild per surrogate, so every surrogate is the same whichever worker computes it.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from ..errors import InputError
from .artefacts import REASONS, artefact_share, flag_artefacts, gap_free_segments
from .bootstrap import block_length_constant
from .series import BeatSeries
from .span import span_from_events
from .windows import (BOUNDARY_SUMMARY_COLUMNS, BOUNDARY_TEST_COLUMNS, WindowSetup, boundary_table,
                      family_tests, lag1_autocorrelation)

__all__ = ["RelateSettings", "RelateResult", "relate", "root_seed", "H_GRID_S", "FAMILIES"]

#: Boundary families of analysis A (each ``trial_type`` its own family).
FAMILIES = ("section", "key", "meter", "tempo_change", "dynamic", "hairpin", "fermata", "pause")
#: The h grid of analysis B: 0.5 to 10 s in 0.5 s steps.
H_GRID_S = tuple(float(h) for h in np.round(np.arange(1, 21) * 0.5, 1))


@dataclass(frozen=True)
class RelateSettings:
    """Every choice of the analysis, with the defaults of PHYSIO-STATS.md section 4."""

    # what to run
    analyses: tuple = ("boundaries", "coincidence")
    # A: boundary windows
    families: tuple = FAMILIES
    min_confidence: float = 0.5
    window_beats: tuple = (20, 80)
    window_s: tuple = (10.0, 30.0)
    guard_s: float = 0.0
    min_valid_share: float = 0.8
    n_pseudo: int = 1000
    pseudo_away: bool = True
    ci_method: str = "pseudo"
    n_bootstrap: int = 1000
    correction: str = "fdr_bh"
    alpha: float = 0.05
    share_null: str = "circular_shift"
    n_share_null: int = 1000
    min_shift_s: float = 30.0
    # artefacts
    successive_rule: str = "malik"
    max_gap_beats: int = 3
    min_coverage: float = 0.95
    # B: change-point coincidence
    min_size_beats: int = 10
    min_size_s: float = 5.0
    penalty: object = "bic_lrv"
    music_source: str = "events"
    score_trains: tuple = ()
    feature_pairs: bool = True
    union_merge_s: float = 0.5
    co_change: tuple = ()
    co_change_s: float = 1.0
    coincidence_window: str = "symmetric"
    lag_s: float = 0.0
    h_grid_s: tuple = H_GRID_S
    null_methods: tuple = ("iaaft", "circular_shift")
    n_surrogates: int = 1000
    iaaft_max_iter: int = 500
    iaaft_tol: float = 1e-6
    min_cp_physio: int = 5
    min_cp_music: int = 3
    n_jobs: int = 1

    def to_dict(self) -> dict:
        return {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(self).items()}


@dataclass
class RelateResult:
    """Tables (``beats``, ``boundary_tests``, ``boundary_summary``, ``changepoints_physio``,
    ``changepoints_music``, ``coincidence_curve``, ``coincidence_summary``), facts about the
    series and run (``meta``), and the warnings to show on the terminal."""

    participant: str
    series_name: str
    tables: dict
    meta: dict
    warnings: list = field(default_factory=list)


def root_seed(seed) -> np.random.SeedSequence:
    """``seed`` (int or SeedSequence) as a SeedSequence."""
    if isinstance(seed, np.random.SeedSequence):
        return seed
    return np.random.SeedSequence(int(seed))


def _seed_record(ss: np.random.SeedSequence) -> dict:
    return {"entropy": int(ss.entropy) if not isinstance(ss.entropy, (list, tuple)) else list(ss.entropy),
            "spawn_key": [int(k) for k in ss.spawn_key]}


def _beats_table(series: BeatSeries, reasons: np.ndarray, participant: str, name: str) -> pd.DataFrame:
    return pd.DataFrame({"participant": participant, "series": name, "time": series.t, "value": series.x,
                         "accepted": reasons == "", "reason": np.where(reasons == "", "n/a", reasons)})


def relate(events: pd.DataFrame, features: pd.DataFrame | None, series: BeatSeries, *,
           settings: RelateSettings = RelateSettings(), seed=0, participant: str = "01",
           series_name: str | None = None, executor=None, progress=None) -> RelateResult:
    """Analyses A and B for one participant's series (see module and package notes).

    Parameters
    ----------
    events : DataFrame
        The annotate event table (``onset`` on the recorder clock).
    features : DataFrame or None
        Continuous features indexed by ``onset`` seconds; needed only for
        ``music_source="detect"``.
    series : BeatSeries
        The physiological series, on the same clock.
    settings : RelateSettings
    seed : int or numpy.random.SeedSequence
    participant : str
        Label written in every table.
    series_name : str, optional
        Label of the series (default ``<kind>:<column>``).
    executor : concurrent.futures.Executor, optional
        Where surrogates are computed (default: ``settings.n_jobs`` local processes, or in
        process for 1).
    progress : callable, optional
        ``progress(task, fraction)``.

    Raises
    ------
    InputError
        The series does not cover the music, or nothing can be inferred (too few values or
        change points); the message names the series' file.
    """
    name = series_name or f"{series.kind}:{series.column or 'value'}"
    where = series.source or "series"
    span = span_from_events(events)
    if span.starts.size == 0 or span.total_s <= 0:
        raise InputError("the events have no 'piece' rows with a duration; relate needs the pieces "
                         "to know when music was playing")
    warnings = [f"{where}: {w}" for w in series.warnings]
    cover = span.covered_share(float(series.t[0]), float(series.t[-1])) if series.n else 0.0
    if cover < settings.min_coverage:
        raise InputError(
            f"the series covers {cover:.0%} of the music ({series.t[0]:.1f}-{series.t[-1]:.1f} s vs "
            f"pieces {span.starts[0]:.1f}-{span.ends[-1]:.1f} s on the recorder clock; at least "
            f"{settings.min_coverage:.0%} needed): is it on the same clock as the events (offset)?",
            path=where)
    reasons = flag_artefacts(series, successive=settings.successive_rule)
    share, verdict = artefact_share(reasons)
    if verdict != "ok":
        warnings.append(f"{where}: {share:.1%} of the values are flagged as artefacts"
                        + (" - results marked unreliable" if verdict == "unreliable" else ""))
    fixed = series.fixed_rate
    min_size = int(round(settings.min_size_s * series.rate_hz)) if fixed else settings.min_size_beats
    segments = gap_free_segments(series, reasons, max_run=settings.max_gap_beats, min_length=4 * min_size)
    rho1 = lag1_autocorrelation([s.x for s in segments])
    root = root_seed(seed)
    kids = root.spawn(4)  # A, B surrogates, B shifts, B's optional nulls (the first three as before)
    meta = {
        "participant": participant, "series": name, "source": series.source, "column": series.column,
        "kind": series.kind, "unit": series.unit, "rate_hz": series.rate_hz, "clock": series.clock,
        "n_values": series.n, "coverage": cover, "omega_s": span.total_s,
        "artefact_share": share, "reliability": verdict,
        "artefact_counts": {k: int(np.sum(reasons == k)) for k in REASONS},
        "rho1": rho1, "n_segments": len(segments),
        "seed": _seed_record(root), "settings": settings.to_dict(),
    }
    tables = {"beats": _beats_table(series, reasons, participant, name)}

    # ------------------------------------------------------------------ A
    bt, bs = [], []
    if "boundaries" in settings.analyses:
        setup = WindowSetup(t=series.t, x=series.x, ok=reasons == "", span=span,
                            fixed_rate_hz=series.rate_hz, guard_s=settings.guard_s,
                            min_valid_share=settings.min_valid_share)
        bounds = boundary_table(events, families=settings.families, min_confidence=settings.min_confidence)
        sizes = settings.window_s if fixed else settings.window_beats
        fams = [f for f in settings.families if (bounds["trial_type"] == f).any()]
        a_seeds = kids[0].spawn(max(1, len(sizes) * len(fams)))
        boot = settings.ci_method == "bootstrap"
        c_block = block_length_constant([s.x for s in segments]) if boot else float("nan")
        if boot:
            meta["bootstrap_block_constant"] = c_block
        k = 0
        for size in sizes:
            for fam in fams:
                # the third child (bootstrap) leaves the first two, and so every other result, as
                # they are without it
                kid = a_seeds[k].spawn(3 if boot else 2)
                rp, rs = (np.random.default_rng(s) for s in kid[:2])
                rb = np.random.default_rng(kid[2]) if boot else None
                k += 1
                tab, summ = family_tests(
                    setup, bounds[bounds["trial_type"] == fam].reset_index(drop=True), size=size,
                    rho1=rho1, k_pseudo=settings.n_pseudo, share_null=settings.share_null,
                    r_share=settings.n_share_null, min_shift_s=settings.min_shift_s,
                    alpha=settings.alpha, correction=settings.correction, ci_method=settings.ci_method,
                    rng_pseudo=rp, rng_share=rs, participant=participant, series=name,
                    pseudo_away=settings.pseudo_away, rng_boot=rb, block_constant=c_block,
                    n_boot=settings.n_bootstrap)
                if verdict == "unreliable":
                    tab["flags"] = tab["flags"].map(lambda f: ",".join([x for x in (f, "unreliable") if x]))
                bt.append(tab)
                bs.append(summ)
                if progress:
                    progress("boundary windows", k / max(1, len(a_seeds)))
    tables["boundary_tests"] = pd.concat(bt, ignore_index=True) if bt else \
        pd.DataFrame(columns=BOUNDARY_TEST_COLUMNS)
    tables["boundary_summary"] = pd.DataFrame(bs, columns=BOUNDARY_SUMMARY_COLUMNS)
    n_tested = int((tables["boundary_tests"]["status"] == "ok").sum())
    meta["boundaries_tested"] = n_tested
    if "boundaries" in settings.analyses and settings.ci_method == "bootstrap" and n_tested:
        bt_ok = tables["boundary_tests"][tables["boundary_tests"]["status"] == "ok"]
        n_fb = int((bt_ok["ci_method"] == "pseudo").sum())
        meta["bootstrap_fallbacks"] = n_fb
        if n_fb:
            warnings.append(f"{where}: {n_fb} of {n_tested} boundary windows are too short for the "
                            f"stationary bootstrap (block {meta['bootstrap_block_constant']:.2f} N^(1/3) > "
                            f"N/4): they have the pseudo-boundary interval (ci_method says which)")

    # ------------------------------------------------------------------ B
    n_sets = 0
    if "coincidence" in settings.analyses:
        from .coincidence import coincidence_analysis

        b_tables, b_meta, b_warn = coincidence_analysis(
            events, features, series, segments, span, settings=settings, min_size=min_size,
            seed_surrogates=kids[1], seed_shifts=kids[2], seed_other=kids[3], participant=participant,
            series_name=name,
            executor=executor, progress=progress)
        tables.update(b_tables)
        meta.update(b_meta)
        warnings.extend(f"{where}: {w}" for w in b_warn)
        n_sets = int(b_meta.get("feature_sets_tested", 0))
    if "boundaries" in settings.analyses and n_tested == 0:
        warnings.append(f"{where}: no boundary could be tested (every window left the pieces or had "
                        f"too few valid values)")
    if n_tested == 0 and n_sets == 0:
        raise InputError("too few values or change points for inference: no boundary window fits "
                         "inside the pieces and no feature set has enough change points", path=where)
    return RelateResult(participant=participant, series_name=name, tables=tables, meta=meta,
                        warnings=warnings)
