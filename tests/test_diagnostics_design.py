"""Heaping, balance, compliance, power and placebo checks on simulated designs (invented data).

Each simulation names its design; bounds are the issue's done-when criteria with a fast-test
tolerance where the replication count is small.
"""
import numpy as np
import pandas as pd
from numpy.testing import assert_allclose

from scanner import scan
from scanner.diagnostics import compliance_profile, covariate_balance, outcome_power, placebo_test
from scanner.estimate import fit_jump, side_data
from tests.conftest import binned


def _spec(**kw):
    spec = {"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
            "search": {"alpha": 0.05}}
    spec.update(kw)
    return spec


def test_heaped_self_report_flags_round_candidates_and_none_usable():
    # Barreca, Lindo & Waddell (2016) mechanism: a third of people round their self-reported value
    # to a multiple of 5, and rounders take up treatment more often; there is no real threshold.
    rng = np.random.default_rng(21)
    n = 60_000
    true = rng.gamma(4, 10, n)
    rounder = rng.random(n) < 1 / 3
    x = np.where(rounder, 5 * np.rint(true / 5), np.rint(true))
    d = (rng.random(n) < 0.15 + 0.002 * true + 0.2 * rounder).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": d}))
    rows = [r for r in res.rows if r["origin"] == "round"]
    jumped = [r for r in rows if r["q_value"] < 0.05]
    assert jumped, "the heaps should create apparent jumps at round values"
    assert all("heaping" in r["flags"] for r in jumped)
    assert not any(r["verdict"] == "usable" for r in rows)
    # Heaps are not read as sorting: the raw density tests reject at every heaped contender,
    # the tests with the heaps' excess removed do not.  Each contender's design checks are
    # their own family (score.design_qvalues), so a clean design is flagged with chance at
    # most alpha: one chance flag among the contenders is allowed, not more.
    assert all(r["density_tests"]["local_polynomial"]["p_value"] < 0.05 for r in jumped)
    assert sum("sorting" in r["flags"] for r in rows) <= 1


def _balance_design(rng, n, shift):
    x = rng.uniform(-1, 1, n)
    d = (rng.random(n) < 0.2 + 0.5 * (x >= 0)).astype(float)
    z = rng.normal(0, 1, n) + 0.3 * x + shift * (x >= 0)     # shift in sd units of the noise
    w = rng.normal(0, 1, n) + 0.5 * z                          # a correlated second covariate
    return pd.DataFrame({"x": np.round(x, 3), "d": d, "z": z, "w": w})


def test_balance_flags_planted_jump_and_holds_level():
    # Planted 0.15 sd covariate jump at n = 50,000 flagged in >= 90% of replications; with smooth
    # covariates the flag rate stays near the 5% level (fast version: 20 reps each, tolerant).
    rng = np.random.default_rng(22)
    hit, false = [], []
    for shift, out in ((0.15, hit), (0.0, false)):
        for _ in range(20):
            df = _balance_design(rng, 50_000, shift)
            st = binned(df, "x", ["d", "z", "w"], ["d"])
            bal = covariate_balance(st, ["z", "w"], 0.0, 0.4)
            out.append(bal.p_value < 0.05)
    assert np.mean(hit) >= 0.9
    assert np.mean(false) <= 0.2


def test_compliance_shares_match_planted_within_two_se():
    # Fuzzy design: 15% always-takers, 25% never-takers, 60% compliers (invented shares).
    rng = np.random.default_rng(23)
    n = 40_000
    x = np.round(rng.uniform(-1, 1, n), 3)
    kind = rng.choice(3, n, p=[0.15, 0.25, 0.60])
    d = np.where(kind == 0, 1, np.where(kind == 1, 0, (x >= 0).astype(int))).astype(float)
    st = binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"])
    data = side_data(st, "d", 0.0)
    fit = fit_jump(st, "d", 0.0, 0.3, data=data)
    cp = compliance_profile(st, data, fit, "at_or_above")
    assert_allclose(cp.share_always + cp.share_never + cp.share_compliers, 1.0, rtol=1e-12)
    for got, se, true in ((cp.share_always, cp.se_always, 0.15), (cp.share_never, cp.se_never, 0.25),
                          (cp.share_compliers, cp.se_compliers, 0.60)):
        assert abs(got - true) <= 2 * se, (got, se, true)
        assert 0 < se < 0.05


def test_power_mde_matches_simulated_rejection_rate():
    # Normal-approximation power function (docs/methods.md, "Power for planned outcomes"): at
    # the reported MDE the estimator's two-sided 5% test should reject in 80% of samples (issue: ±4 points; the fast
    # version uses 300 replications, so ±7 points).
    rng = np.random.default_rng(24)
    n, h = 8000, 0.4

    def sample(effect):
        x = np.round(rng.uniform(-1, 1, n), 2)
        y = 1 + 0.5 * x + effect * (x >= 0) + rng.normal(0, 1 + 0.3 * (x >= 0), n)
        return binned(pd.DataFrame({"x": x, "y": y}), "x", ["y"])

    st = sample(0.0)
    pw = outcome_power(side_data(st, "y", 0.0), h, 1.0, 0.05, name="y")
    mde = pw["mde_itt"]
    assert 1.0 < pw["design_effect"] < 10
    rej = [fit_jump(sample(mde), "y", 0.0, h).p_value < 0.05 for _ in range(300)]
    assert abs(np.mean(rej) - 0.8) <= 0.07
    assert_allclose(pw["mde_complier"], mde, rtol=1e-12)


def test_placebo_p_small_for_real_jump_and_not_for_none():
    rng = np.random.default_rng(25)
    n = 30_000
    x = np.round(rng.uniform(-1, 1, n), 3)
    for jump, small in ((0.3, True), (0.0, False)):
        d = (rng.random(n) < 0.3 + jump * (x >= 0)).astype(float)
        st = binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"])
        data = side_data(st, "d", 0.0)
        fit = fit_jump(st, "d", 0.0, 0.1, data=data)
        pl = placebo_test(st, data, 0.0, 0.1, fit.z)
        assert pl.n_placebos >= 10
        assert (pl.p_value <= 1 / (pl.n_placebos + 1) + 1e-12) == small
        assert all(abs(c) >= 0.1 - 1e-9 for c in pl.cutoffs)   # windows never cross the cutoff


def test_outcome_effects_only_behind_the_switch():
    # Blinded screening (DESIGN.md): outcomes enter through power unless effects are requested.
    rng = np.random.default_rng(26)
    n = 20_000
    x = np.round(rng.uniform(-1, 1, n), 3)
    d = (rng.random(n) < 0.2 + 0.5 * (x >= 0)).astype(float)
    y = 0.4 * d + rng.normal(0, 1, n)
    df = pd.DataFrame({"x": x, "d": d, "y": y})
    blind = scan(_spec(outcomes={"columns": ["y"]}), data=df)
    assert blind.rows and all("outcome_effects" not in r for r in blind.rows)
    assert all(r["power"][0]["outcome"] == "y" for r in blind.rows)
    spec = _spec(outcomes={"columns": ["y"], "effects": True}, search={"round_numbers": True})
    rows = [r for r in scan(spec, data=df).rows if r["cutoff"] == 0.0]
    assert rows and all(r["power"][0]["outcome"] == "y" for r in rows)
    eff = rows[0]["outcome_effects"][0]
    assert "effects = true" in eff["label"]
    assert abs(eff["complier_effect"] - 0.4) < 3 * eff["complier_se"]


def test_placebo_cutoff_on_a_support_point_puts_its_rows_right():
    # A one-decimal lab value, cutoff 6.2, h = 0.55: the placebo cutoff 6.2 − 2h = 5.1 is a
    # support point, and (5.1 − 6.2) + 1.1 misses 0 by a rounding error.  Reference: statsmodels
    # WLS with HC1 on the rows, triangular kernel, rows with x ≥ 5.1 on the right.
    import statsmodels.api as sm
    rng = np.random.default_rng(26)
    x = np.round(rng.normal(6.0, 1.2, 40_000), 1)
    d = (rng.random(x.size) < 0.2 + 0.3 * (x >= 6.2) + 0.1 * (x >= 5.1)).astype(float)
    st = binned(pd.DataFrame({"x": x, "d": d}), "x", ["d"], ["d"])
    data = side_data(st, "d", 6.2)
    pl = placebo_test(st, data, 6.2, 0.55, fit_jump(st, "d", 6.2, 0.55, data=data).z)
    assert 5.1 in pl.cutoffs                       # reported as the decimal, not 5.1000000000000005
    u = x - 5.1
    w = np.clip(1 - np.abs(u) / 0.55, 0, None)
    m = (w > 0) & (x < 6.2)                        # the placebo window stays left of the real cutoff
    D = (x[m] >= 5.1).astype(float)
    Z = np.column_stack([np.ones(m.sum()), D, u[m], D * u[m]])
    ref = sm.WLS(d[m], Z, weights=w[m]).fit(cov_type="HC1")
    assert_allclose(pl.z[pl.cutoffs.index(5.1)], ref.tvalues[1], rtol=1e-9)
