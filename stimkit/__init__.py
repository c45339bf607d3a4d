"""stimkit: from a score and a performance recording to a time-stamped stimulus-event table.

Sub-packages follow the data flow (see DEVELOPERS.md):
``score`` (parse, boundaries, tempo map) -> ``audio`` (streaming features) ->
``align`` (score-to-recording DTW) -> ``timeline`` (merge, clock sync, segmentation) ->
``export`` / ``report`` / ``stats`` (hand-off). ``render`` synthesizes performances for the
demo and the tests. The library never prints; :mod:`stimkit.cli` is the only place that does.

``stimkit.read_events``, ``stimkit.read_stim`` and ``stimkit.read_beats`` load the hand-off
files (see :mod:`stimkit.io`).
"""

__version__ = "0.1.0"

__all__ = ["__version__", "read_events", "read_stim", "read_beats"]

_LOADERS = ("read_events", "read_stim", "read_beats")


def __getattr__(name):  # PEP 562: the loaders without importing pandas at ``import stimkit``
    if name in _LOADERS:
        from . import io

        return getattr(io, name)
    raise AttributeError(f"module 'stimkit' has no attribute {name!r}")
