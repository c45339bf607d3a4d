"""The analysis span Omega: the union of the pieces on the recorder clock, and its circular axis.

Omega is the union of the ``piece`` events' intervals ``[onset, onset + duration]``; its length
``T`` is the sum of their lengths. Circular shifts (of boundaries, of music change points) are
made on the *concatenated* axis: the pieces laid end to end, position ``u`` in ``[0, T)``; a
shift adds ``u`` modulo ``T`` there and maps back to recorder time, so nothing lands in the
applause or the speech between pieces.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["Span", "span_from_events"]


@dataclass(frozen=True)
class Span:
    """Disjoint, sorted intervals ``starts[i] .. ends[i]`` (s, recorder clock)."""

    starts: np.ndarray
    ends: np.ndarray

    @property
    def total_s(self) -> float:
        """T = |Omega| in seconds."""
        return float(np.sum(self.ends - self.starts))

    def interval_of(self, t) -> np.ndarray:
        """Index of the interval holding each time, -1 outside Omega."""
        t = np.asarray(t, dtype=np.float64)
        k = np.searchsorted(self.starts, t, "right") - 1
        inside = (k >= 0) & (t <= self.ends[np.clip(k, 0, None)])
        return np.where(inside, k, -1)

    def contains(self, t) -> np.ndarray:
        return self.interval_of(t) >= 0

    def to_axis(self, t) -> np.ndarray:
        """Recorder time -> position on the concatenated axis (NaN outside Omega)."""
        t = np.asarray(t, dtype=np.float64)
        k = self.interval_of(t)
        cum = np.r_[0.0, np.cumsum(self.ends - self.starts)]
        kk = np.clip(k, 0, None)
        return np.where(k >= 0, cum[kk] + t - self.starts[kk], np.nan)

    def from_axis(self, u) -> np.ndarray:
        """Position on the concatenated axis (wrapped into [0, T)) -> recorder time."""
        u = np.mod(np.asarray(u, dtype=np.float64), self.total_s)
        cum = np.r_[0.0, np.cumsum(self.ends - self.starts)]
        k = np.clip(np.searchsorted(cum, u, "right") - 1, 0, self.starts.size - 1)
        return self.starts[k] + (u - cum[k])

    def covered_share(self, t0: float, t1: float) -> float:
        """Share of Omega inside ``[t0, t1]``."""
        inter = np.clip(np.minimum(self.ends, t1) - np.maximum(self.starts, t0), 0, None)
        return float(inter.sum() / self.total_s) if self.total_s > 0 else 0.0


def span_from_events(events: pd.DataFrame) -> Span:
    """Omega from the ``piece`` rows of an event table (overlapping pieces are merged)."""
    tt = events["trial_type"].astype(str) if "trial_type" in events.columns else pd.Series([], dtype=str)
    p = events[tt.to_numpy() == "piece"]
    on = pd.to_numeric(p.get("onset"), errors="coerce").to_numpy(np.float64)
    du = pd.to_numeric(p.get("duration"), errors="coerce").to_numpy(np.float64)
    ok = np.isfinite(on) & np.isfinite(du) & (du > 0)
    iv = sorted(zip(on[ok], on[ok] + du[ok]))
    starts, ends = [], []
    for s, e in iv:
        if starts and s <= ends[-1]:
            ends[-1] = max(ends[-1], e)
        else:
            starts.append(s)
            ends.append(e)
    return Span(np.asarray(starts, np.float64), np.asarray(ends, np.float64))
