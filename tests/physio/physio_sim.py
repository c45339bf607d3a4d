"""Simulated beat series and event tables shared by the physiology tests."""

import numpy as np
import pandas as pd


def ar1_beats(n, phi, sd_ms, rng, *, level=None):
    """RR series (ms) = level(t) + AR(1) noise of marginal SD ``sd_ms``; times close each interval."""
    e = rng.normal(0, sd_ms * np.sqrt(1 - phi ** 2), n)
    noise = np.empty(n)
    noise[0] = rng.normal(0, sd_ms)
    for i in range(1, n):
        noise[i] = phi * noise[i - 1] + e[i]
    rr = np.empty(n)
    t = np.empty(n)
    now = 0.0
    for i in range(n):
        base = 800.0 if level is None else level(now)
        rr[i] = base + noise[i]
        now += rr[i] / 1000.0
        t[i] = now
    return t, rr


def events_for(pieces, boundaries, *, family="dynamic", changes=()):
    rows = [dict(onset=s, duration=e - s, trial_type="piece", label=f"p{k}", piece=f"p{k}", confidence=np.nan)
            for k, (s, e) in enumerate(pieces)]
    rows += [dict(onset=float(b), duration=0.0, trial_type=family, label="mf", piece="p0", confidence=0.9,
                  measure=k + 1, beat=1) for k, b in enumerate(boundaries)]
    rows += [dict(onset=float(c), duration=0.0, trial_type="feature_change", label=lab, piece=np.nan,
                  confidence=np.nan) for c, lab in changes]
    return pd.DataFrame(rows)
