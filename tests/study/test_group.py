"""Group statistics against closed forms and against scipy / statsmodels called directly.

Sources: PHYSIO-STATS §7.8 (prevalence with 8 of 20 -> gamma_map = 0.368421, binomtest p =
2.857e-6); Ince et al. 2021 (eLife, Bayesian prevalence: MAP formula, HPDI = shortest interval,
equal posterior density at both ends); the balanced random-intercept model, whose REML
estimates equal the ANOVA (method-of-moments) estimators when those are positive (Searle, Casella
& McCulloch 1992, "Variance Components", ch. 4 -- from memory); scipy.stats.wilcoxon,
scipy.stats.false_discovery_control and statsmodels MixedLM on the same data.
"""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from stimkit.study.group import (bayesian_prevalence, direction_table, group_results, mixed_model_table,
                                 participant_p, prevalence_table)


def test_prevalence_closed_form_8_of_20():
    r = bayesian_prevalence(8, 20, alpha=0.05)
    assert r.gamma_map == pytest.approx(0.368421, abs=1e-6)          # PHYSIO-STATS §7.8
    assert r.p_binom == pytest.approx(2.857e-6, rel=1e-3)            # PHYSIO-STATS §7.8
    assert r.p_binom == pytest.approx(stats.binomtest(8, 20, 0.05, alternative="greater").pvalue, rel=1e-12)
    # MAP formula of Ince et al. 2021 with beta = 1
    assert r.gamma_map == pytest.approx((8 / 20 - 0.05) / 0.95, rel=1e-12)


@pytest.mark.parametrize("k,n", [(8, 20), (3, 10), (12, 12)])
def test_hpdi_is_the_shortest_95_percent_interval(k, n):
    # HPD property: 95 % of the truncated posterior inside, equal density at both ends unless an
    # end is at the edge of [alpha, 1] (Ince et al. 2021: posterior Beta(k+1, n-k+1) on theta)
    a = 0.05
    r = bayesian_prevalence(k, n, alpha=a)
    post = stats.beta(k + 1, n - k + 1)
    lo, hi = a + (1 - a) * r.hpdi_low, a + (1 - a) * r.hpdi_high
    mass = (post.cdf(hi) - post.cdf(lo)) / (post.cdf(1.0) - post.cdf(a))
    assert mass == pytest.approx(0.95, abs=1e-6)
    assert r.hpdi_low <= r.gamma_map <= r.hpdi_high
    if 0 < r.hpdi_low and r.hpdi_high < 1:
        assert post.pdf(lo) == pytest.approx(post.pdf(hi), rel=1e-4)


def test_no_responder_gives_map_zero():
    r = bayesian_prevalence(0, 10, alpha=0.05)
    assert r.gamma_map == 0.0 and r.hpdi_low == 0.0
    assert r.p_binom == pytest.approx(1.0)


def test_participant_p_is_bonferroni_min_over_sessions():
    assert participant_p([0.01, 0.2]) == pytest.approx(0.02)
    assert participant_p([0.7, 0.9]) == 1.0
    assert math.isnan(participant_p([float("nan")]))


def _summary(p_by_participant, *, n_beats=20):
    rows = []
    for pid, ps in p_by_participant.items():
        for j, p in enumerate(ps):
            rows.append({"participant": pid, "session": str(j + 1), "performance": "x", "series": "rr",
                         "N": n_beats, "trial_type": "key", "p_share": p})
    return pd.DataFrame(rows)


def test_prevalence_table_constructed_8_of_20():
    # 20 participants, one session each; 8 with p_share below alpha
    ps = {f"{i:02d}": [0.01 if i < 8 else 0.5] for i in range(20)}
    prev, resp = prevalence_table(_summary(ps), alpha=0.05)
    row = prev.iloc[0]
    assert (row["k"], row["n"]) == (8, 20)
    assert row["gamma_map"] == pytest.approx(0.368421, abs=1e-6)     # PHYSIO-STATS §7.8
    assert row["p_binom"] == pytest.approx(2.857e-6, rel=1e-3)       # PHYSIO-STATS §7.8
    assert resp["responder"].sum() == 8


def test_two_sessions_count_once_per_participant():
    # 0.03 twice is p = 0.06 for the participant (Bonferroni), not a responder at 0.05
    prev, resp = prevalence_table(_summary({"a": [0.03, 0.03], "b": [0.001, 0.9]}), alpha=0.05)
    assert list(resp["responder"]) == [False, True]
    assert (prev.iloc[0]["k"], prev.iloc[0]["n"]) == (1, 2)


def _tests_table(rng, *, participants=6, kinds=("dynamic", "tempo_change", "key"), per_kind=1, effect=None,
                 sd_u=3.0, sd_e=2.0):
    effect = effect or {"dynamic": 5.0, "tempo_change": -2.0, "key": 0.0}
    rows = []
    for i in range(participants):
        u = rng.normal(0, sd_u)
        t = 10.0
        for k in kinds:
            for j in range(per_kind):
                t += 7.0
                rows.append({"participant": f"{i:02d}", "session": "1", "performance": "evening", "series": "rr",
                             "N": 20, "piece": "p", "trial_type": k, "label": f"{k}{j}", "measure": j + 1,
                             "beat": 1.0, "onset": t + 0.01 * i, "delta": effect[k] + u + rng.normal(0, sd_e),
                             "z_null": rng.normal(0.8 if k == "dynamic" else 0.0, 1.0), "status": "ok"})
    return pd.DataFrame(rows)


def test_mixed_model_matches_statsmodels_directly():
    import statsmodels.formula.api as smf

    t = _tests_table(np.random.default_rng(3), participants=8, per_kind=3)
    table, notes = mixed_model_table(t)
    ref = smf.mixedlm("delta ~ 0 + C(trial_type)", t, groups=t["participant"]).fit(reml=True)
    for kind in ("dynamic", "key", "tempo_change"):
        row = table[table["term"] == kind].iloc[0]
        term = f"C(trial_type)[{kind}]"
        assert row["estimate"] == pytest.approx(ref.fe_params[term], rel=1e-6)
        assert row["se"] == pytest.approx(ref.bse_fe[term], rel=1e-5)
        assert row["p"] == pytest.approx(ref.pvalues[term], rel=1e-4, abs=1e-12)
    assert table["group_var"].iloc[0] == pytest.approx(float(ref.cov_re.iloc[0, 0]), rel=1e-5)


def test_mixed_model_balanced_closed_form():
    # one boundary of each of J kinds per participant (balanced, additive two-way layout):
    # fixed effects = kind means; REML variances = ANOVA estimators; se = sqrt((s_u^2 + s_e^2)/n)
    rng = np.random.default_rng(11)
    t = _tests_table(rng, participants=12, per_kind=1, sd_u=4.0, sd_e=1.5)
    table, _ = mixed_model_table(t)
    y = t.pivot(index="participant", columns="trial_type", values="delta")
    n, J = y.shape
    means = y.mean(axis=0)
    resid = y.values - y.values.mean(axis=1, keepdims=True) - means.values[None, :] + y.values.mean()
    ms_e = (resid ** 2).sum() / ((n - 1) * (J - 1))
    ms_p = J * ((y.values.mean(axis=1) - y.values.mean()) ** 2).sum() / (n - 1)
    s2_u = (ms_p - ms_e) / J
    assert s2_u > 0  # the closed form holds when the ANOVA estimate is positive
    for kind in y.columns:
        row = table[table["term"] == kind].iloc[0]
        assert row["estimate"] == pytest.approx(means[kind], rel=1e-6)
        assert row["se"] == pytest.approx(math.sqrt((s2_u + ms_e) / n), rel=1e-3)
    assert table["resid_var"].iloc[0] == pytest.approx(ms_e, rel=1e-3)
    assert table["group_var"].iloc[0] == pytest.approx(s2_u, rel=1e-3)


def test_direction_matches_scipy_wilcoxon_and_bh():
    t = _tests_table(np.random.default_rng(5), participants=9, per_kind=2)
    d = direction_table(t, alpha=0.05)
    assert len(d) == 6 and set(d["n"]) == {9}
    pvals = []
    for (kind, label), g in t.groupby(["trial_type", "label"], sort=True):
        z = g.sort_values("participant")["z_null"].to_numpy()
        row = d[(d["trial_type"] == kind) & (d["label"] == label)].iloc[0]
        ref = stats.wilcoxon(z, alternative="two-sided")
        assert row["p_wilcoxon"] == pytest.approx(ref.pvalue, rel=1e-12)
        assert row["mean_z"] == pytest.approx(z.mean(), rel=1e-12)
        assert row["n_up"] == int((z > 0).sum())
        pvals.append((row.name, ref.pvalue))
    idx, p = zip(*pvals)
    q = stats.false_discovery_control(np.array(p), method="bh")
    np.testing.assert_allclose(d.loc[list(idx), "q_bh"].to_numpy(), q, rtol=1e-12)


def test_direction_averages_a_participants_sessions_first():
    t = _tests_table(np.random.default_rng(8), participants=4, kinds=("dynamic",))
    t2 = t.copy()
    t2["session"] = "2"
    t2["z_null"] = t["z_null"] + 1.0
    d = direction_table(pd.concat([t, t2], ignore_index=True))
    assert d.iloc[0]["n"] == 4
    assert d.iloc[0]["mean_z"] == pytest.approx((t["z_null"] + 0.5).mean(), rel=1e-12)


def test_rows_that_are_not_ok_are_left_out():
    t = _tests_table(np.random.default_rng(9), participants=5)
    t.loc[0, "status"] = "edge"
    t.loc[0, "delta"] = 1e6
    g = group_results({"boundary_tests": t, "boundary_summary": _summary({"a": [0.5]})})
    assert g.mixed["estimate"].abs().max() < 100
    assert g.direction["n"].min() == 4
