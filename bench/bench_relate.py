"""Benchmark: 1000 IAAFT surrogates with change-point re-detection for a 30-minute beat series.

Goal (task): <= 60 s on 2 cores for one participant's 30-minute series, memory flat in the
number of surrogates. Printed beside it, measured in the same run:

- the same surrogates on 1 process (the speed-up of the process pool);
- the naive detector, ``ruptures.Pelt(model="l2", jump=1)``, on a few surrogates, extrapolated
  to 1000 (the cost the KernelCPD choice avoids);
- peak resident memory of the whole relate() run at 200 and at 1000 surrogates (flat: the
  surrogates are generated, re-detected and reduced to their change-point times chunk by chunk);
- the calibration of analysis B's global test on 100 null series (level steps at random times,
  music change points at other random times): p_global < 0.05 in about 5 % of them, for the
  IAAFT null (default) and the circular shift of the music train;
- the coverage of analysis A's 95 % intervals of a zero difference on AR(1) series: ``pseudo``
  (default) and the stationary bootstrap (``bootstrap``, where its block is at most N/4);
- the cost of the ``mbic`` penalty's exact solver against the default detector.

Run by hand: ``.venv/bin/python bench/bench_relate.py`` (never from pytest). The machine may be
shared: repeat a run before you trust a figure; CPU time is printed as well as wall time.
"""

from __future__ import annotations

import multiprocessing as mp
import resource
import sys
import time
from dataclasses import replace

import numpy as np
import pandas as pd


def series_30_min(seed: int = 1):
    """A 30-minute RR series (AR(1), phi 0.6, SD 30 ms) with ten 60 ms level steps, and events."""
    rng = np.random.default_rng(seed)
    steps = np.sort(rng.uniform(60, 1740, 10))
    t, rr, now, e = [], [], 0.0, 0.0
    while now < 1810.0:
        e = 0.6 * e + rng.normal(0, 30 * np.sqrt(1 - 0.36))
        x = 800 + 60 * (np.searchsorted(steps, now) % 2) + e
        now += x / 1000
        t.append(now)
        rr.append(x)
    ev = [dict(onset=5.0, duration=1800.0, trial_type="piece", label="p", piece="p", confidence=np.nan)]
    ev += [dict(onset=float(s + rng.uniform(-2, 2)), duration=0.0, trial_type="feature_change",
                label="short_term_lufs", piece=np.nan, confidence=np.nan) for s in steps]
    ev += [dict(onset=float(c), duration=0.0, trial_type="feature_change", label="centroid_hz", piece=np.nan,
                confidence=np.nan) for c in np.sort(rng.uniform(10, 1800, 40))]
    return np.asarray(t), np.asarray(rr), pd.DataFrame(ev)


def _child_peak_rss(n_surrogates: int, q) -> None:
    from stimkit.physio import BeatSeries, RelateSettings, relate

    t, rr, ev = series_30_min()
    s = BeatSeries(t=t, x=rr, valid=np.ones(t.size, bool), kind="rr", source="bench", column="rr")
    relate(ev, None, s, settings=replace(RelateSettings(), analyses=("coincidence",), n_surrogates=n_surrogates,
                                         n_jobs=1), seed=0)
    q.put(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)


def peak_rss_mb(n_surrogates: int) -> float:
    ctx = mp.get_context("spawn")  # a fresh process per measurement
    q = ctx.Queue()
    p = ctx.Process(target=_child_peak_rss, args=(n_surrogates, q))
    p.start()
    v = q.get()
    p.join()
    return v


def null_calibration(runs: int = 100, r: int = 99) -> None:
    """Analysis B under the null: series with level steps at random times, music trains at other
    random times; the share of p_global < 0.05 must lie in the binomial 99 % band around 0.05."""
    from scipy import stats

    from stimkit.errors import InputError
    from stimkit.physio import BeatSeries, RelateSettings, relate

    rng = np.random.default_rng(42)
    rej, tested = {"iaaft": 0, "circular_shift": 0}, 0
    w0 = time.perf_counter()
    for _ in range(runs):
        steps = np.sort(rng.uniform(40, 560, 8))
        t, rr, now, e = [], [], 0.0, 0.0
        while now < 610.0:
            e = 0.5 * e + rng.normal(0, 25 * np.sqrt(0.75))
            x = 800 + 70 * (np.searchsorted(steps, now) % 2) + e
            now += x / 1000
            t.append(now)
            rr.append(x)
        ev = [dict(onset=5.0, duration=600.0, trial_type="piece", label="p", piece="p", confidence=np.nan)]
        ev += [dict(onset=float(c), duration=0.0, trial_type="feature_change", label="short_term_lufs",
                    piece=np.nan, confidence=np.nan) for c in np.sort(rng.uniform(10, 600, 12))]
        s = BeatSeries(t=np.asarray(t), x=np.asarray(rr), valid=np.ones(len(t), bool), kind="rr", source="null")
        try:
            res = relate(pd.DataFrame(ev), None, s, settings=replace(RelateSettings(), analyses=("coincidence",),
                                                                      n_surrogates=r),
                         seed=int(rng.integers(1 << 31)))
        except InputError:  # fewer than 5 change points found: no inference for this series
            continue
        cs = res.tables["coincidence_summary"]
        rows = cs[(cs.reference == "physio") & (cs.feature_set == "short_term_lufs")]
        if len(rows):
            tested += 1
            for m in rej:
                rej[m] += bool(rows.loc[rows.null_method == m, "p_global"].iloc[0] < 0.05)
    tested = max(tested, 1)
    lo, hi = stats.binom.interval(0.99, tested, 0.05)
    for m, k in rej.items():
        print(f"analysis B under the null, {m}: {k} of {tested} series with p_global < 0.05 ({k / tested:.3f}; "
              f"binomial 99 % band {lo / tested:.3f}-{hi / tested:.3f}: {'inside' if lo <= k <= hi else 'OUTSIDE'})")
    print(f"  ({time.perf_counter() - w0:.0f} s for the null series)")


def ci_coverage(runs: int = 300) -> None:
    """Coverage of a zero difference by analysis A's 95 % intervals on AR(1) series (no effect)."""
    from stimkit.physio.bootstrap import block_length_constant, bootstrap_delta_ci

    rng = np.random.default_rng(7)
    for phi in (0.3, 0.5, 0.7):
        for n_w in (20, 80):
            cov_p, cov_b, used = [], [], 0
            for _ in range(runs):
                e = rng.normal(size=3000)
                x = np.empty(3000)
                x[0] = e[0] / np.sqrt(1 - phi ** 2)
                for i in range(1, 3000):
                    x[i] = phi * x[i - 1] + e[i]
                c = block_length_constant([x])
                # pseudo: centred differences at 1000 random places of the same series
                at = rng.integers(n_w, x.size - n_w, 1000)
                cs = np.cumsum(np.r_[0.0, x])
                d = (cs[at + n_w] - cs[at]) / n_w - (cs[at] - cs[at - n_w]) / n_w
                d -= d.mean()
                b = int(rng.integers(n_w, x.size - n_w))
                delta = x[b:b + n_w].mean() - x[b - n_w:b].mean()
                cov_p.append(delta - np.quantile(d, 0.975) <= 0 <= delta - np.quantile(d, 0.025))
                lo, hi, _ = bootstrap_delta_ci(x[b:b + n_w], x[b - n_w:b], constant=c, reps=1000, rng=rng)
                if np.isfinite(lo):
                    used += 1
                    cov_b.append(lo <= 0 <= hi)
            print(f"95 % interval coverage, AR(1) phi {phi}, N {n_w}: pseudo {np.mean(cov_p):.3f}; bootstrap "
                  f"{np.mean(cov_b) if cov_b else float('nan'):.3f} (used at {used} of {runs} boundaries)")


def mbic_cost() -> None:
    """Seconds per detection, default (KernelCPD linear, bic_lrv) vs mbic's exact solver."""
    from stimkit.physio.changepoints import segment

    t, rr, _ = series_30_min()
    for rule in ("bic_lrv", "mbic"):
        w0 = time.perf_counter()
        for _ in range(5):
            b, _ = segment(rr, min_size=10, rule=rule)
        print(f"detector {rule}: {(time.perf_counter() - w0) / 5 * 1000:.0f} ms per detection on {rr.size} beats "
              f"({b.size} change points)")


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if "--calibration" in argv:  # the calibration and cost parts only
        null_calibration()
        ci_coverage()
        mbic_cost()
        return 0
    if "--null-and-memory" in argv:  # the last two parts only
        null_calibration()
        m200, m1000 = peak_rss_mb(200), peak_rss_mb(1000)
        print(f"peak RSS of relate (coincidence only): {m200:.0f} MB at 200 surrogates, {m1000:.0f} MB at 1000 "
              f"({'flat' if m1000 <= 1.15 * m200 else 'GROWS'})")
        return 0
    return _all()


def _all() -> int:
    import ruptures as rpt

    from stimkit.physio import BeatSeries
    from stimkit.physio.artefacts import flag_artefacts, gap_free_segments
    from stimkit.physio.changepoints import penalty_value
    from stimkit.physio.coincidence import surrogate_changepoints
    from stimkit.physio.surrogates import iaaft

    t, rr, _ = series_30_min()
    s = BeatSeries(t=t, x=rr, valid=np.ones(t.size, bool), kind="rr", source="bench", column="rr")
    segs = gap_free_segments(s, flag_artefacts(s), min_length=40)
    print(f"series: {t.size} beats over {t[-1] - t[0]:.0f} s, {len(segs)} gap-free segment(s)")
    R = 1000
    out = {}
    import os

    print(f"load average before: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (other work slows "
          f"the wall times; the CPU times do not depend on it much)")
    for jobs in (2, 1):
        def cpu():
            a, b = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
            return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime

        c0, w0 = cpu(), time.perf_counter()
        cps = surrogate_changepoints(segs, n=R, seed=np.random.SeedSequence(0), min_size=10, rule="bic_lrv",
                                     n_jobs=jobs)
        wall = time.perf_counter() - w0
        out[jobs] = (wall, cpu() - c0, np.mean([c.size for c in cps]))
        print(f"{R} surrogates with re-detection, {jobs} process(es): {wall:.1f} s wall, {out[jobs][1]:.1f} s CPU "
              f"(all processes), mean {out[jobs][2]:.1f} change points per surrogate")
    ideal = out[2][1] / 2
    print(f"goal <= 60 s on 2 cores: measured {out[2][0]:.1f} s wall ({'met' if out[2][0] <= 60 else 'NOT met'} "
          f"on this machine now); CPU-bound time on 2 free cores = CPU / 2 = {ideal:.1f} s "
          f"({'met' if ideal <= 60 else 'NOT met'}); speed-up of 2 processes over 1: {out[1][0] / out[2][0]:.2f}x")

    # the naive detector on a few surrogates
    rng = np.random.default_rng(5)
    k = 3
    w0 = time.perf_counter()
    for _ in range(k):
        x = iaaft(segs[0].x, rng)[0]
        rpt.Pelt(model="l2", min_size=10, jump=1).fit(x).predict(pen=penalty_value(x))
    naive = (time.perf_counter() - w0) / k
    per = out[1][1] / R
    print(f"naive ruptures.Pelt(l2, jump=1): {naive:.2f} s wall per surrogate -> ~{naive * R / 60:.0f} min for {R} "
          f"on 1 process; KernelCPD path {per * 1000:.0f} ms CPU per surrogate incl. IAAFT (~{naive / per:.0f}x)")

    null_calibration()
    ci_coverage()
    mbic_cost()
    m200, m1000 = peak_rss_mb(200), peak_rss_mb(1000)
    print(f"peak RSS of relate (coincidence only): {m200:.0f} MB at 200 surrogates, {m1000:.0f} MB at 1000 "
          f"({'flat' if m1000 <= 1.15 * m200 else 'GROWS'})")
    print(f"load average after: {os.getloadavg()[0]:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
