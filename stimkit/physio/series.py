"""The physiological series type shared by the readers and the analyses: :class:`BeatSeries`.

Conventions
-----------
- ``t`` holds strictly increasing times in seconds on the physiological recorder's clock, the
  clock of the events' ``onset`` (DESIGN.md). A beat-interval value is stamped at the beat that
  closes the interval (``rr``) or at the beat on which it is measured (``ari``, an
  activation-recovery interval, or any other per-beat measure).
- ``x`` holds the values in ``unit`` (``ms`` for intervals; ``uS`` for skin conductance).
- ``rate_hz`` is ``None`` for event-stamped series (one value per beat or breath) and the
  sampling rate for fixed-rate series (the tonic skin-conductance level), which the analyses
  window in seconds instead of beats.
- ``valid`` is the input's own validity (``valid``/``artefact``/``beat_type`` columns, rule R0
  of :mod:`stimkit.physio.artefacts`); the artefact rules add their flags later.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["BeatSeries", "KINDS", "INTERVAL_KINDS"]

#: Kinds of series: beat intervals (rr), per-beat measures (ari, other), breath-to-breath
#: intervals (breath) and the tonic skin-conductance level (eda, fixed rate).
KINDS = ("rr", "ari", "other", "breath", "eda")
#: Kinds whose values are intervals in ms.
INTERVAL_KINDS = ("rr", "ari", "other", "breath")


@dataclass(frozen=True)
class BeatSeries:
    """One physiological series on the recorder clock (see module notes).

    Attributes
    ----------
    t : ndarray
        Times (s, recorder clock), strictly increasing.
    x : ndarray
        Values in ``unit``.
    valid : ndarray of bool
        False where the input itself marks the value invalid (rule R0).
    kind : str
        One of :data:`KINDS`.
    unit : str
        ``"ms"`` for intervals, ``"uS"`` for skin conductance.
    rate_hz : float or None
        Sampling rate of a fixed-rate series; ``None`` for one value per beat or breath.
    source : str
        File name the series came from (for messages and outputs; never an absolute path).
    column : str
        Column of that file.
    clock : str
        How the times were put on the recorder clock (shown in outputs).
    warnings : tuple of str
        What the reader noticed (quantised beat times, values taken as seconds, ...).
    suspect : ndarray of bool or None
        Beats the peak classifier of a raw ECG flagged (rule R4); ``None`` for other inputs.
    """

    t: np.ndarray
    x: np.ndarray
    valid: np.ndarray
    kind: str = "rr"
    unit: str = "ms"
    rate_hz: float | None = None
    source: str = ""
    column: str = ""
    clock: str = "times in the file are seconds on the recorder clock (same zero as the events' onset)"
    warnings: tuple = field(default_factory=tuple)
    suspect: np.ndarray | None = None

    def __post_init__(self):
        for name in ("t", "x"):
            object.__setattr__(self, name, np.asarray(getattr(self, name), dtype=np.float64))
        object.__setattr__(self, "valid", np.asarray(self.valid, dtype=bool))
        if not (self.t.shape == self.x.shape == self.valid.shape) or self.t.ndim != 1:
            raise ValueError("t, x and valid must be 1-D arrays of one length")

    @property
    def n(self) -> int:
        """Number of values."""
        return int(self.t.size)

    @property
    def fixed_rate(self) -> bool:
        """True for a fixed-rate series (windows in seconds), False for one value per beat."""
        return self.rate_hz is not None

    def shifted(self, offset_s: float) -> "BeatSeries":
        """The same series with ``offset_s`` added to every time (a stated clock offset)."""
        from dataclasses import replace

        return replace(self, t=self.t + float(offset_s),
                       clock=f"{self.clock}; then shifted by {float(offset_s):+.6f} s")
