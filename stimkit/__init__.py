"""stimkit: from a score and a performance recording to a time-stamped stimulus-event table.

Sub-packages follow the data flow (see DEVELOPERS.md):
``score`` (parse, boundaries, tempo map) -> ``audio`` (streaming features) ->
``align`` (score-to-recording DTW) -> ``timeline`` (merge, clock sync, segmentation) ->
``export`` / ``report`` / ``stats`` (hand-off). ``render`` synthesizes performances for the
demo and the tests. The library never prints; :mod:`stimkit.cli` is the only place that does.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
