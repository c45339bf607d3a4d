"""First statistics for physiologists: feature change points, windows around events, coincidence.

- :mod:`~stimkit.stats.changes` -- change points of the feature frame (Foote 2000 novelty).
- :mod:`~stimkit.stats.windows` -- feature means before/after each event; per-piece summaries.
- :mod:`~stimkit.stats.coincidence` -- score boundaries near change points vs circular-shift chance.
- :mod:`~stimkit.stats.roles` -- which feature column plays which role (loudness, tempo, ...).

All are pure functions over pandas DataFrames indexed by frame-centre time in seconds.
"""
