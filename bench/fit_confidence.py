"""Fit the alignment's local confidence model (run by hand, never in CI).

    python bench/fit_confidence.py                     # fit on the development material, print
    python bench/fit_confidence.py --check fluidr3     # only measure the current model on held-out renders

The local confidence of :mod:`stimkit.align.confidence` is a logistic model (Cox 1958) of "this
score position is placed within 100 ms" from margins of the best warping path, the local cost
ratio, the disagreement of the two passes and the local tempo's deviation. This script renders
the **development** cases of ``bench/align_material.py`` (every condition; the project's renderer
and fluidsynth with TimGM6mb when it is installed), aligns them, looks up the features and the
true error of every note (by printed bar, pass and offset: :mod:`stimkit.render.evaluate`), fits
the coefficients by iteratively reweighted least squares (each condition weighted equally), then
chooses the offset so that on this material positions with confidence >= 0.9 are within 100 ms
at least 97 % of the time, and prints the calibration per condition. Paste the printed
``COEFFICIENTS`` and ``OFFSET`` into ``stimkit/align/confidence.py``.

The held-out material (FluidR3_GM renders, the ``held_out`` cases) is never fitted on:
``--check`` measures the model in place on it and prints the two calibration goals (positions
with confidence >= 0.9 are >= 95 % within 100 ms; positions more than 300 ms off have confidence
< 0.5 in >= 90 % of cases) and Spearman's rank correlation between confidence and error.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

TARGET_HIGH = 0.97       # share within 100 ms wanted among confidence >= 0.9 (goal 0.95, margin)


def collect(synth: str, *, held_out: bool, work: Path, log=print):
    """Per-note features and absolute errors of every case: ``(X, err, condition)``."""
    import align_material as M
    from stimkit.align.confidence import design
    from stimkit.render.cases import prepare_case, run_case

    render = None
    if synth != "ours":
        import sampled

        if not sampled.available(synth):
            log(f"{synth}: fluidsynth or the soundfont is missing; skipped")
            return None
        render = sampled.renderer(synth)
    X, err, cond, conf = [], [], [], []
    for case in M.cases(held_out=held_out):
        run = run_case(prepare_case(case, work / synth, render=render))
        sc = run.scored
        ok = sc["found"].to_numpy()
        e = np.abs(sc["error_s"].to_numpy())
        q = sc["est_qn"].to_numpy()
        loc = run.result.local
        import pandas as pd

        feats = pd.DataFrame({c: np.interp(q[ok], loc["score_qn"].to_numpy(),
                                           np.minimum(loc[c].to_numpy(np.float64), 1e6))
                              for c in loc.columns if c != "score_qn"})
        X.append(design(feats))
        err.append(e[ok])
        conf.append(sc["confidence"].to_numpy()[ok])
        cond += [case.condition] * int(ok.sum())
        missing = int((~ok).sum())
        log(f"{synth:9s} {case.condition:22s} {case.piece:18s} notes {len(e):5d} missing {missing:3d} "
            f"median {1000 * np.median(e[ok]):6.1f} ms")
    return np.concatenate(X), np.concatenate(err), np.array(cond), np.concatenate(conf)


def fit(X, y, w, *, l2: float = 1e-3, iterations: int = 50):
    """Logistic regression by iteratively reweighted least squares (weights ``w``, ridge ``l2``)."""
    b = np.zeros(X.shape[1])
    for _ in range(iterations):
        p = 1.0 / (1.0 + np.exp(-(X @ b)))
        W = w * p * (1 - p) + 1e-9
        g = X.T @ (w * (y - p)) - l2 * b
        H = X.T @ (X * W[:, None]) + l2 * np.eye(len(b))
        b = b + np.linalg.solve(H, g)
    return b


def report(err, conf, cond, *, title):
    from scipy.stats import spearmanr

    hi = conf >= 0.9
    bad = err > 0.3
    print(f"\n{title}")
    print(f"  all: {len(err)} notes; confidence >= 0.9: {hi.mean():.1%} of notes, of which "
          f"{np.mean(err[hi] <= 0.1) if hi.any() else float('nan'):.1%} within 100 ms (goal >= 95 %); "
          f"{int(bad.sum())} notes > 300 ms off, {np.mean(conf[bad] < 0.5) if bad.any() else float('nan'):.1%} "
          f"of them with confidence < 0.5 (goal >= 90 %); Spearman rho {spearmanr(conf, err).correlation:+.2f}")
    for c in sorted(set(cond)):
        m = cond == c
        h, b = hi & m, bad & m
        print(f"  {c:22s} n {m.sum():5d}  >=0.9 {h.sum() / m.sum():5.1%}  within 100 of those "
              f"{np.mean(err[h] <= 0.1) if h.any() else float('nan'):6.1%}  >300 ms {b.sum():4d}  "
              f"low-conf among them {np.mean(conf[b] < 0.5) if b.any() else float('nan'):6.1%}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--check", metavar="SYNTH", help="only measure the current model on held-out renders "
                    "(ours, timgm6mb, fluidr3)")
    a = ap.parse_args(argv)
    from stimkit.align.confidence import COEFFICIENTS, OFFSET

    with tempfile.TemporaryDirectory() as d:
        work = Path(d)
        if a.check:
            # FluidR3_GM renders are held out whole; of the other synthesizers, the held-out cases
            got = collect(a.check, held_out=None if a.check == "fluidr3" else True, work=work)
            if got is not None:
                X, err, cond, conf = got
                report(err, conf, cond, title=f"held-out material ({a.check}), current model")
            return 0
        parts = [g for g in (collect(s, held_out=False, work=work) for s in ("ours", "timgm6mb")) if g is not None]
    X = np.concatenate([p[0] for p in parts])
    err = np.concatenate([p[1] for p in parts])
    cond = np.concatenate([p[2] for p in parts])
    y = (err <= 0.1).astype(float)
    w = np.zeros(len(y))
    for c in set(cond):
        w[cond == c] = 1.0 / np.sum(cond == c)
    w *= len(y) / w.sum()
    b = fit(X, y, w)
    z = X @ b
    offset = 0.0
    for off in np.arange(0.0, -6.01, -0.1):
        p = 1 / (1 + np.exp(-(z + off)))
        hi = p >= 0.9
        if not hi.any() or np.mean(err[hi] <= 0.1) >= TARGET_HIGH:
            offset = float(off)
            break
    conf = 1 / (1 + np.exp(-(z + offset)))
    report(err, conf, cond, title="development material, fitted model")
    print(f"\nCOEFFICIENTS = {tuple(round(float(v), 3) for v in b)}")
    print(f"OFFSET = {offset:.1f}")
    print(f"(current: COEFFICIENTS = {COEFFICIENTS}, OFFSET = {OFFSET})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
