"""TimeMap: a monotone piecewise-linear map between two kinds of time.

The four kinds of time in stimkit (DESIGN.md) are ``score_qn`` (quarter notes from the start of
the score as performed), ``nominal`` (seconds at the notated tempo), ``recording`` (seconds from
the first sample of the recording) and ``onset`` (seconds on the physiological recorder's clock).
A :class:`TimeMap` carries knots ``x`` (in kind ``src``) and ``y`` (in kind ``dst``), both strictly
increasing, interpolates linearly between knots and extrapolates with the slope of the first /
last segment. It is invertible (:meth:`inverse`) and composable (:meth:`then`).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import StimkitError

__all__ = ["TimeMap", "TIME_KINDS"]

TIME_KINDS = ("score_qn", "nominal", "recording", "onset")


@dataclass(frozen=True)
class TimeMap:
    """Monotone piecewise-linear map ``src -> dst``.

    Parameters
    ----------
    x, y : array_like
        Knots, strictly increasing, same length >= 2 (a single knot is allowed with ``slope``).
    src, dst : str
        Names of the kinds of time (one of :data:`TIME_KINDS`).
    """

    x: np.ndarray
    y: np.ndarray
    src: str = "score_qn"
    dst: str = "nominal"
    meta: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        x = np.asarray(self.x, dtype=np.float64).ravel()
        y = np.asarray(self.y, dtype=np.float64).ravel()
        if x.shape != y.shape or x.size < 2:
            raise StimkitError("TimeMap needs two or more knots of equal length in x and y")
        if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
            raise StimkitError("TimeMap knots must be finite")
        if np.any(np.diff(x) <= 0) or np.any(np.diff(y) <= 0):
            raise StimkitError(f"TimeMap {self.src}->{self.dst} must be strictly increasing")
        object.__setattr__(self, "x", x)
        object.__setattr__(self, "y", y)

    @classmethod
    def linear(cls, *, offset: float, slope: float, src: str, dst: str, span: float = 1.0):
        """``dst = offset + slope * src`` (e.g. a clock fit); ``slope`` must be > 0."""
        if not slope > 0:
            raise StimkitError("TimeMap slope must be positive")
        x = np.array([0.0, float(span)])
        return cls(x, offset + slope * x, src=src, dst=dst)

    def __call__(self, t):
        t = np.asarray(t, dtype=np.float64)
        out = np.interp(t, self.x, self.y)
        lo, hi = t < self.x[0], t > self.x[-1]
        if np.any(lo):
            s = (self.y[1] - self.y[0]) / (self.x[1] - self.x[0])
            out = np.where(lo, self.y[0] + (t - self.x[0]) * s, out)
        if np.any(hi):
            s = (self.y[-1] - self.y[-2]) / (self.x[-1] - self.x[-2])
            out = np.where(hi, self.y[-1] + (t - self.x[-1]) * s, out)
        return out if out.ndim else float(out)

    def inverse(self) -> "TimeMap":
        """The map ``dst -> src``."""
        return TimeMap(self.y, self.x, src=self.dst, dst=self.src, meta=dict(self.meta))

    def then(self, other: "TimeMap") -> "TimeMap":
        """Composition ``other(self(t))``: ``self.src -> other.dst``."""
        if other.src != self.dst:
            raise StimkitError(f"cannot compose {self.src}->{self.dst} with {other.src}->{other.dst}")
        xs = np.union1d(self.x, self.inverse()(other.x))
        return TimeMap(xs, other(self(xs)), src=self.src, dst=other.dst)

    def slope(self, t):
        """Local derivative d dst / d src at ``t`` (right-hand segment)."""
        t = np.asarray(t, dtype=np.float64)
        seg = np.clip(np.searchsorted(self.x, t, side="right") - 1, 0, self.x.size - 2)
        s = np.diff(self.y) / np.diff(self.x)
        return s[seg]

    def to_dict(self, *, decimals: int = 6) -> dict:
        """Plain, JSON-ready form (knots rounded to ``decimals``)."""
        return {
            "from": self.src,
            "to": self.dst,
            "x": [round(float(v), decimals) for v in self.x],
            "y": [round(float(v), decimals) for v in self.y],
        }
