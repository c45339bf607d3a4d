"""Silence: stretches where a level curve stays below a threshold for a minimum length.

What it computes
----------------
:func:`file_silences` streams a recording through the BS.1770 meter (no other features; fast) and
returns its silent segments; :func:`silence_segments` takes a level curve (loudness in LUFS, or RMS in dBFS) sampled at
regular window centres and returns ``(start_s, end_s)`` segments in which every window is below
``threshold_db`` for at least ``min_length_s``. :func:`silence_mask` marks given times that fall
inside such segments.

Conventions
-----------
- ``level_db[i]`` is the level of a window of length ``window_s`` centred at
  ``start_s + i * step_s`` (``recording`` time, seconds). A silent stretch is the union of its quiet
  windows, so a run of quiet centres ``c_a .. c_b`` gives ``[c_a - window_s/2, c_b + window_s/2]``,
  clipped to ``[0, duration_s]``; with short windows (the feature pipeline uses 50 ms K-weighted
  windows on a 5 ms grid) the edges are within a few milliseconds of the true ones.
- NaN counts as quiet (no signal); ``-inf`` (digital silence) is quiet.
- Defaults: ``threshold_db = -50`` (LUFS or dBFS, as the curve), ``min_length_s = 1.0``.

References
----------
EBU R 128 (2020) for the loudness scale; the threshold-and-minimum-duration rule is common
practice in pause detection.
"""

from __future__ import annotations

import numpy as np

__all__ = ["silence_segments", "silence_mask", "file_silences", "SILENCE_THRESHOLD_DB", "SILENCE_MIN_LENGTH_S",
           "SILENCE_WINDOW_S"]

SILENCE_THRESHOLD_DB = -50.0
SILENCE_MIN_LENGTH_S = 1.0
SILENCE_WINDOW_S = 0.05


def silence_segments(level_db, *, step_s: float, start_s: float = 0.0, window_s: float = 0.0,
                     threshold_db: float = SILENCE_THRESHOLD_DB,
                     min_length_s: float = SILENCE_MIN_LENGTH_S,
                     duration_s: float | None = None) -> list[tuple[float, float]]:
    """Silent segments ``[(start_s, end_s), ...]`` of a regularly sampled level curve."""
    lv = np.asarray(level_db)
    if lv.size == 0:
        return []
    quiet = ~(lv >= threshold_db)  # NaN -> quiet
    d = np.diff(np.concatenate([[0], quiet.astype(np.int8), [0]]))
    runs_a = np.flatnonzero(d == 1)
    runs_b = np.flatnonzero(d == -1) - 1
    out = []
    end_limit = duration_s if duration_s is not None else np.inf
    for a, b in zip(runs_a, runs_b):
        s = max(0.0, start_s + a * step_s - window_s / 2.0)
        e = min(end_limit, start_s + b * step_s + window_s / 2.0)
        if e - s >= min_length_s - 1e-9:
            out.append((float(s), float(e)))
    return out


def silence_mask(segments, times_s) -> np.ndarray:
    """1 where ``times_s`` lies inside one of ``segments`` (half-open ``[start, end)``), else 0."""
    t = np.asarray(times_s, dtype=np.float64)
    m = np.zeros(t.shape, dtype=np.int64)
    for s, e in segments:
        m[(t >= s) & (t < e)] = 1
    return m


def file_silences(path, *, threshold_lufs: float = SILENCE_THRESHOLD_DB,
                  min_length_s: float = SILENCE_MIN_LENGTH_S, window_s: float = SILENCE_WINDOW_S,
                  block_s: float = 10.0) -> list[tuple[float, float]]:
    """Silent segments of a recording file: K-weighted loudness (BS.1770 channel weights) over
    ``window_s`` windows on the 5 ms grid below ``threshold_lufs`` for at least ``min_length_s``.

    Streams the file (memory does not grow with length); times are ``recording`` seconds.
    Raises :class:`stimkit.errors.InputError` for a file that is not a readable recording.
    """
    from .loudness import GRID_STEP_S, LoudnessMeter
    from .read import audio_info, iter_blocks

    info = audio_info(path)
    meter = LoudnessMeter(sample_rate_hz=info.sample_rate_hz, channels=info.channels, true_peak=False)
    for _, block in iter_blocks(info.path, block_s=block_s):
        meter.push(block)
    duration = meter.duration_s
    centres = np.arange(int(np.floor(duration / GRID_STEP_S)) + 1) * GRID_STEP_S
    level = meter.level(centres, window_s=window_s)
    return silence_segments(level, step_s=GRID_STEP_S, window_s=window_s, threshold_db=threshold_lufs,
                            min_length_s=min_length_s, duration_s=duration)
