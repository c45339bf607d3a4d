"""Relating a participant's physiological series to the music (research statistics).

The public API, one call per participant x session x series::

    from stimkit.physio import read_physio, relate, RelateSettings

    series = read_physio("sub-01_physio.tsv.gz", kind="rr")          # -> BeatSeries
    result = relate(events, features, series, settings=RelateSettings(), seed=seed,
                    participant="01")                                  # -> RelateResult
    result.tables["boundary_tests"]       # analysis A, one row per boundary x window size
    result.tables["boundary_summary"]     # share of significant boundaries vs chance
    result.tables["coincidence_curve"]    # analysis B, success rate vs h with the null band
    result.tables["coincidence_summary"]  # exceedance ranges, global test per feature set

- ``events``: the annotate event table (``onset`` on the recorder clock, ``trial_type``,
  ``label``, ``measure``, ``beat``, ``piece``, ``confidence``); ``piece`` rows define the analysis
  span Omega.
- ``features``: the continuous features indexed by ``onset`` seconds (from ``_stim.tsv.gz`` via
  :func:`stimkit.physio.inputs.read_stim`), or ``None`` when the music change points come from
  the ``feature_change`` events (the default).
- ``seed``: an int or a :class:`numpy.random.SeedSequence`; every random step draws from a
  child of it (``SeedSequence.spawn``: one per analysis and per surrogate), so results do not
  depend on the number of worker processes. A study passes one child per participant x session.
- ``RelateResult.tables`` columns follow PHYSIO-STATS.md sections 2.7 and 3.6 and are described
  in :data:`stimkit.physio.outputs.COLUMN_INFO`; ``RelateResult.meta`` holds the series facts
  (artefact share, reliability, lag-1 autocorrelation, penalty, clock), the settings and seeds.

Modules (one sentence each):

- :mod:`.series` -- the :class:`BeatSeries` type (times on the recorder clock, values, validity).
- :mod:`.read` -- BIDS physio, plain beat tables and fixed-rate ECG/EDA/respiration to a series.
- :mod:`.artefacts` -- rules R0-R4 with reason codes, artefact share, gap-free segments.
- :mod:`.span` -- the analysis span Omega (union of pieces) and its circular axis.
- :mod:`.windows` -- analysis A: boundary windows, tests T1-T4, pseudo-boundary calibration, BH,
  share of significant boundaries vs chance.
- :mod:`.changepoints` -- change points by penalised least squares (ruptures KernelCPD linear =
  PELT l2) with the autocorrelation-aware ``bic_lrv`` penalty; music change-point trains.
- :mod:`.surrogates` -- IAAFT surrogates and circular shifts.
- :mod:`.coincidence` -- analysis B: success rates over h, analytic event coincidence value,
  null bands, exceedance ranges and the max-statistic global test.
- :mod:`.relate` -- :func:`relate`, :class:`RelateSettings`, :class:`RelateResult`.
- :mod:`.inputs` -- reading an annotate output (events TSV, ``_stim.tsv.gz`` + sidecar).
- :mod:`.outputs` -- tidy TSVs with JSON sidecars; :mod:`.figures` -- forest and band plots.
- :mod:`.group` -- prevalence across participants (Ince et al. 2021).

Cautions: exploratory research statistics, not a clinical tool; association, not causation;
see README "Cautions" and PHYSIO-STATS.md section 5.
"""

from .read import read_physio
from .relate import RelateResult, RelateSettings, relate
from .series import BeatSeries

__all__ = ["BeatSeries", "read_physio", "relate", "RelateSettings", "RelateResult"]
