"""Break locations: the one-break fit, constant sides, several breaks, lattices, open data."""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats as sps

from scanner.breaks import search_pair
from scanner.candidates import Candidate, on_lattice, round_cutoffs
from scanner.locate import locate, profile_break

from .conftest import binned


def _lattice(values, p_left, p_right, at, rows=400, seed=0):
    """Rows on a lattice with uptake probabilities given per side as functions of x (invented)."""
    rng = np.random.default_rng(seed)
    x = np.repeat(np.asarray(values, float), rows)
    p = np.where(x >= at, p_right(x), p_left(x))
    return pd.DataFrame({"x": x, "d": (rng.random(x.size) < np.clip(p, 0, 1)).astype(float)})


def test_one_break_fit_equals_two_statsmodels_ols_fits():
    # Reference: statsmodels OLS on the raw rows of the window.  S(γ) is the residual sum of
    # squares of y ~ 1 + D + u + D·u (separate lines each side, Hansen 2000's one fit); the jump
    # is the coefficient on D with u = x − γ, and its SE is max(HC1, classical) of that fit.
    df = _lattice(np.arange(0, 60), lambda x: 0.5 - 0.004 * x, lambda x: 0.2 + 0.003 * x, 31, 60, 2)
    st = binned(df, "x", ["d"], ["d"])
    br = profile_break(st, "d", 20, 40, 10, 50)
    win = df[(df.x >= 10) & (df.x <= 50)]

    def fit(c):
        u = win.x.to_numpy() - c
        D = (u >= 0).astype(float)
        return sm.OLS(win.d.to_numpy(), np.column_stack([np.ones_like(u), D, u, D * u]))
    ssr = {c: fit(c).fit().ssr for c in range(20, 41)}
    best = min(ssr, key=ssr.get)
    assert br.location == best and abs(best - 31) <= 3
    ref = fit(br.location)
    assert_allclose(br.jump, ref.fit().params[1], rtol=1e-9)
    assert_allclose(br.se, max(ref.fit(cov_type="HC1").bse[1], ref.fit().bse[1]), rtol=1e-9)
    # LR set: splits with (S(γ) − S(γ̂)) / (S(γ̂)/(N − 4)) ≤ 7.35, all of one sign here.
    s2 = ssr[best] / (len(win) - 4)
    inside = [c for c in ssr if (ssr[c] - ssr[best]) / s2 <= 7.3523]
    assert (br.ci_low, br.ci_high, br.ci_low_open) == (min(inside) - 1, max(inside), True)


def test_constant_side_breaks_are_placed_by_the_fit_not_by_t():
    # Uptake falls to exactly 0 at 61 and stays 0 (as in the open-data case below).  A |t|
    # argmax placed such breaks several points inside the constant side with the wrong sign
    # (the reason for this estimator); the fit puts them on the gap below 61 with a negative jump.
    for seed in range(5):
        df = _lattice(np.arange(0, 120), lambda x: 0.12 + 0.0015 * (61 - x), lambda x: 0 * x, 61,
                      200, seed)
        ps = search_pair(binned(df, "x", ["d"], ["d"]), "d", seed=seed, draws=300)
        pk = ps.peaks[0]
        assert pk.location == 61.0 and pk.jump < 0, (seed, pk.location, pk.jump)
        assert (pk.ci_low, pk.ci_high, pk.ci_low_open) == (60.0, 61.0, True)


def test_check_location_survives_a_constant_side():
    # `cutscan check`'s location uses the same one-break fit: a rule at 60 with nobody treated
    # below it is found at 60 with a positive jump (a |t| argmax reported 62–69, wrong sign).
    df = _lattice(np.arange(0, 120), lambda x: 0 * x, lambda x: 0.3 + 0.004 * (x - 60), 60, 200, 3)
    loc = locate(binned(df, "x", ["d"], ["d"]), "d", 60.0, bandwidth=12.0)
    assert loc.cutoff == 60.0 and loc.jump > 0.2 and "Hansen 2000" in loc.method
    assert (loc.ci_low, loc.ci_high) == (59.0, 60.0)


def test_a_real_break_next_to_a_stronger_one_is_found():
    # Two breaks 9 apart on a whole-number lattice: the blanket exclusion of 2h (h ≈ 18) around
    # the first hid the second.  The sequential search (Bai & Perron 1998) models the first as a
    # wall and finds the second with its own test.
    df = _lattice(np.arange(0, 120), lambda x: 0.2 + 0 * x,
                  lambda x: 0.45 + 0.2 * (x >= 70), 61, 250, 4)
    ps = search_pair(binned(df, "x", ["d"], ["d"]), "d", seed=1, draws=300)
    assert sorted(p.location for p in ps.peaks[:2]) == [61.0, 70.0]
    assert all(p.jump > 0.1 for p in ps.peaks[:2])
    assert [s["step"] for s in ps.tests][:2] == [1, 2] and ps.tests[1]["search_p"] < 0.05


def test_discovered_rows_tell_one_story():
    # The held-out estimate, interval and p of a discovered row: p = P(|N(b,1)| ≥ |t|) and the
    # interval jump ± q·se with q the 95% quantile of |N(b, 1)| (scipy.stats.foldnorm),
    # b = bias bound / se, so 0 lies outside the interval exactly when p < 0.05; confirm_half
    # repeats the row's own fields.
    from scanner.scan import scan
    df = _lattice(np.arange(0, 100), lambda x: 0.2 + 0.002 * x, lambda x: 0.45 + 0.002 * x, 37,
                  400, 5)
    res = scan({"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
                "search": {"round_numbers": False}}, df)
    rows = [r for r in res.rows if r["origin"] == "discovered"]
    assert rows and rows[0]["cutoff"] == 37.0
    for r in rows:
        b = r["bias_bound"] / r["se"]
        q = sps.foldnorm.ppf(0.95, b)
        assert_allclose([r["ci_low"], r["ci_high"]], [r["jump"] - q * r["se"], r["jump"] + q * r["se"]])
        assert (r["ci_low"] > 0 or r["ci_high"] < 0) == (r["p_value"] < 0.05)
        assert r["interval"] == "bias-bounded"
        for k, v in r["confirm_half"].items():
            assert v == r[k] or (v != v and r[k] != r[k]), k


def test_round_numbers_between_recorded_values_are_examined():
    # Half-integer lattice: 0, ±10, ... are never recorded, but each is the split between its
    # neighbours; reported at the round value with the neighbours on the row.
    df = _lattice(np.arange(-30, 30) + 0.5, lambda x: 0.3 + 0 * x, lambda x: 0.3 + 0 * x, 0, 100)
    st = binned(df, "x", ["d"], ["d"])
    rc = round_cutoffs(st)
    assert 0.0 in rc and 10.0 in rc and -10.0 in rc
    c = on_lattice(Candidate("x", "d", 0.0, "round"), st)
    assert (c.cutoff, c.cutoff_declared, c.split_low, c.split_high) == (0.0, 0.0, -0.5, 0.5)


def test_declared_cutoff_between_recorded_values_is_applied_on_them():
    # 190 mg/dL is 4.91337 mmol/L (x 0.02586, from memory) on values recorded to 0.1. Applied
    # literally to the recorded values, any inequality puts 4.9 below the line and 5.0 on or
    # above it: the split (4.9, 5.0), stated as x ≥ 5.0 (at_or_above) or x > 4.9 (above).
    vals = np.round(np.arange(3.0, 7.0, 0.1), 1)
    st = binned(_lattice(vals, lambda x: 0.1 + 0 * x, lambda x: 0.1 + 0 * x, 5, 50), "x", ["d"], ["d"])
    ge = on_lattice(Candidate("x", "d", 4.91337, "declared"), st)
    assert (ge.cutoff, ge.cutoff_declared, ge.split_low, ge.split_high) == (5.0, 4.91337, 4.9, 5.0)
    gt = on_lattice(Candidate("x", "d", 4.91337, "declared", right_closed=False), st)
    assert (gt.cutoff, gt.split_low, gt.split_high) == (4.9, 4.9, 5.0)
    # A rule "above 4.95" treats 5.0 and not 4.9; rounding 4.95 up to 5.0 first and then
    # applying "> 5.0" (the earlier placement) moved the split a whole step, to (5.0, 5.1).
    half = on_lattice(Candidate("x", "d", 4.95, "declared", right_closed=False), st)
    assert (half.cutoff, half.split_low, half.split_high) == (4.9, 4.9, 5.0)
    up = on_lattice(Candidate("x", "d", 4.95, "declared"), st)
    assert (up.cutoff, up.split_low, up.split_high) == (5.0, 4.9, 5.0)


def test_location_fast_simulation():
    # Fast version of benchmarks/bench_discover_locate.py (500 replications there): every design
    # with one replication; location within one gap / h/4 and the right sign in all of them.
    from benchmarks.discover_locate_sim import close_enough, locate_rep
    cells = list(locate_rep(11, n=20_000, draws=300).values())
    assert len(cells) == 12
    assert all(close_enough(c) for c in cells), cells
    assert all(c["sign_ok"] for c in cells)
    assert sum(c["covered"] for c in cells) >= 10


@pytest.fixture(scope="module")
def mortgages():
    causaldata = pytest.importorskip("causaldata")
    return causaldata.mortgages.load_pandas().data[["qob_minus_kw", "vet_wwko"]]


def test_mortgages_veteran_share_breaks(mortgages):
    # Open data: causaldata 0.1.5 `mortgages` (Fetter 2013, AEJ: Economic Policy 5(2)).  The
    # veteran share falls from 0.086 to exactly 0 between birth quarters 13.5 and 14.5 (read
    # off the table itself) and drops steeply around 0, the eligibility cutoff the paper studies.
    # With round numbers and discovery on, both are candidates and both have the data's sign.
    from scanner.scan import scan
    res = scan({"running": [{"column": "qob_minus_kw"}], "treatments": {"columns": ["vet_wwko"]},
                "search": {"round_numbers": True, "discover": True}}, mortgages)
    rows = res.rows
    late = [r for r in rows if 13.5 <= r["cutoff"] <= 14.5
            or 13.5 <= (r.get("location") or np.nan) <= 14.5]
    assert late and all(r["jump"] < 0 for r in late)
    at0 = [r for r in rows if r["cutoff"] == 0.0]
    assert at0 and at0[0]["origin"] == "round" and at0[0]["jump"] < 0
    assert (at0[0]["split_low"], at0[0]["split_high"]) == (-0.5, 0.5)
    # No break is placed inside the run of zeros (18.5 was reported before, with a + sign).
    assert not [r for r in rows if r["origin"] == "discovered" and r["cutoff"] > 14.5]


def test_discovered_rows_without_a_held_out_half_tell_one_story():
    # Searched and estimated on the same rows, the p-value is the larger of the bias-bounded and
    # the search-adjusted one; the interval then uses the larger critical value too (the search's
    # sup-|t| quantile), so it excludes zero only when the p-value is below alpha.
    from scanner.scan import scan
    df = _lattice(np.arange(0, 100), lambda x: 0.2 + 0.002 * x, lambda x: 0.45 + 0.002 * x, 37,
                  400, 5)
    res = scan({"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
                "search": {"round_numbers": False, "confirm": False}}, df)
    rows = [r for r in res.rows if r["origin"] == "discovered"]
    assert rows
    for r in rows:
        assert not r["split"]
        crit = r["discovery_half"]["critical"]
        assert r["ci_high"] - r["ci_low"] >= 2 * crit * r["se"] * (1 - 1e-12)
        if r["ci_low"] > 0 or r["ci_high"] < 0:
            assert r["p_value"] < 0.05


@pytest.mark.parametrize("jump,seed", [(0.08, 1), (0.06, 0), (0.25, 5)])
def test_discovered_rows_without_a_held_out_half_p_and_interval_agree_both_ways(jump, seed):
    # The reverse direction too: p < alpha exactly when the interval excludes zero.  With a
    # weak jump the row's own |t| can sit between the bias-bounded and the search's critical
    # value; the search part of p was the search's own sup-|t| p, and said "clear jump" (p 0.011)
    # beside an interval holding zero.
    from scanner.scan import scan
    df = _lattice(np.arange(0, 100), lambda x: 0.2 + 0.002 * x, lambda x: 0.2 + jump + 0.002 * x,
                  37, 400, seed)
    res = scan({"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
                "search": {"round_numbers": False, "confirm": False}}, df)
    for r in (r for r in res.rows if r["origin"] == "discovered"):
        if not np.isfinite(r["p_value"]):
            continue
        excludes = r["ci_low"] > 0 or r["ci_high"] < 0
        assert (r["p_value"] < 0.05) == excludes, (r["p_value"], r["ci_low"], r["ci_high"])
        if r["verdict"] in ("usable", "caution", "doubtful"):
            assert excludes
