"""Change points: Foote (2000) novelty, checked against the kernel correlation on an explicit
self-similarity matrix, and on synthetic piecewise-constant features with known change times."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stimkit.stats.changes import change_points, novelty_curve, standardize_features


def _frame(rate_hz=10.0, seconds=120.0, seed=1):
    t = (np.arange(int(seconds * rate_hz)) + 0.5) / rate_hz  # frame centres
    rng = np.random.default_rng(seed)
    loud = np.where(t < 40.0, -30.0, -22.0) + 0.5 * rng.standard_normal(t.size)
    tempo = np.where(t < 80.0, 90.0, 120.0) + 1.0 * rng.standard_normal(t.size)
    noise = rng.standard_normal(t.size)
    return pd.DataFrame({"short_term_lufs": loud, "tempo_bpm": tempo, "other": noise}, index=t)


def test_matches_explicit_checkerboard_kernel():
    # Foote 2000: novelty(t) = sum_{a,b} K(a,b) S(t+a, t+b), S = -squared distance, K the
    # Gaussian-tapered checkerboard; computed here on the full matrix, the slow way.
    rng = np.random.default_rng(0)
    t = np.arange(80) / 4.0
    f = pd.DataFrame(rng.standard_normal((80, 3)), index=t, columns=list("abc"))
    half = 6
    nov = novelty_curve(f, half_width_s=half / 4.0)
    z = standardize_features(f).to_numpy()
    S = -((z[:, None, :] - z[None, :, :]) ** 2).sum(-1)
    a = np.arange(1, half + 1) - 0.5
    g = np.exp(-0.5 * (a / (half / 2.0)) ** 2)
    u = np.concatenate([-g[::-1], g])
    K = np.outer(u, u)
    for i in range(half, 80 - half + 1):
        brute = float(np.sum(K * S[i - half:i + half, i - half:i + half]))
        step_norm = nov["strength"].iloc[i] * g.sum()
        assert brute == pytest.approx(2.0 * step_norm ** 2, rel=1e-9, abs=1e-9)
    assert np.isnan(nov["strength"].iloc[half - 1]) and np.isnan(nov["strength"].iloc[-half + 1])
    assert np.isfinite(nov["strength"].iloc[half]) and np.isfinite(nov["strength"].iloc[-half])


def test_finds_known_steps():
    cp = change_points(_frame())
    assert len(cp) == 2
    # the steps are between the frames at 39.95 and 40.05 s, and at 79.95 / 80.05 s
    assert cp["recording"].tolist() == pytest.approx([40.0, 80.0], abs=0.3)
    assert cp["features"].iloc[0].split(",")[0] == "short_term_lufs"
    assert cp["features"].iloc[1].split(",")[0] == "tempo_bpm"
    assert cp["changes"].iloc[1].startswith("tempo_bpm:+")  # tempo went up
    assert (cp["strength"] >= 1.0).all()


def test_stationary_noise_has_no_change_points():
    rng = np.random.default_rng(5)
    t = np.arange(1200) / 10.0
    f = pd.DataFrame(rng.standard_normal((1200, 4)), index=t, columns=list("abcd"))
    assert len(change_points(f)) == 0


def test_spans_keep_the_kernel_inside_pieces():
    f = _frame()
    spans = pd.DataFrame({"start": [0.0, 40.0], "end": [40.0, 120.0]})
    cp = change_points(f, spans=spans)
    # the 40 s step is now a span edge: only the 80 s change remains
    assert cp["recording"].tolist() == pytest.approx([80.0], abs=0.3)


def test_nan_gaps_and_constant_columns():
    f = _frame()
    f["flat"] = 1.0
    f.iloc[100:130, 1] = np.nan
    cp = change_points(f)
    assert "flat" not in ",".join(cp["features"])
    assert cp["recording"].tolist() == pytest.approx([40.0, 80.0], abs=0.3)


def test_default_features_one_per_aspect():
    # twelve chroma columns and three loudness columns must not outvote a tempo change
    t = (np.arange(1200) + 0.5) / 10.0
    rng = np.random.default_rng(2)
    f = pd.DataFrame({
        "momentary_lufs": -25 + rng.standard_normal(t.size),
        "short_term_lufs": -25 + 0.3 * rng.standard_normal(t.size),
        "rms_dbfs": -20 + rng.standard_normal(t.size),
        "tempo_bpm": np.where(t < 60.0, 90.0, 130.0) + rng.standard_normal(t.size),
        **{f"chroma_{k}": rng.random(t.size) for k in range(12)},
    }, index=t)
    from stimkit.stats.roles import change_columns

    assert change_columns(f) == ["short_term_lufs", "tempo_bpm"]
    cp = change_points(f)
    assert cp["recording"].tolist() == pytest.approx([60.0], abs=0.3)
    assert cp["features"].iloc[0] == "tempo_bpm"


def test_silence_floor_is_clipped_at_the_gate():
    # BS.1770-4 absolute gate -70 LUFS: a -120 floor and a -70 floor are the same silence
    t = (np.arange(600) + 0.5) / 10.0
    loud = np.where(t < 30.0, -120.0, -70.0)
    z = standardize_features(pd.DataFrame({"short_term_lufs": loud}, index=t))
    assert z.shape[1] == 0  # constant after clipping: no information left
