"""Each report figure on a planted case: the plotted data are checked, not only that a file exists.

Reference values come from row-level computations on the raw rows (numpy/pandas group means and
counts, statsmodels WLS with HC1) or from the formula of METHODS §12 (IMSE bins, after Calonico,
Cattaneo & Titiunik 2015, JASA 110(512)).  Data are simulated (invented), as simulations are.
"""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from scanner.diagnostics import covariate_balance, mccrary_test
from scanner.estimate import fit_jump
from scanner.estimate.local import Z95
from scanner.report import figures
from scanner.report.html import render
from scanner.report.plots import (density_plot, imse_bins, sensitivity_plot, timeline_plot,
                                  uptake_plot)

from .conftest import binned

C, H = 50.0, 12.0


@pytest.fixture(scope="module")
def planted():
    """Fuzzy uptake jump of +0.4 at x = 50 on a one-decimal running variable, with dates."""
    rng = np.random.default_rng(8)
    n = 40_000
    x = np.round(rng.normal(50, 15, n), 1)
    p = np.clip(0.1 + 0.004 * (x - 50) + 0.4 * (x >= C), 0, 1)
    d = (rng.random(n) < p).astype(float)
    age = rng.normal(60, 10, n) + 0.02 * (x - 50)
    year = rng.integers(2019, 2023, n)
    date = pd.to_datetime([f"{y}-{m:02d}-15" for y, m in zip(year, rng.integers(1, 13, n))])
    return pd.DataFrame({"x": x, "d": d, "age": age, "date": date})


@pytest.fixture(scope="module")
def stats(planted):
    return binned(planted, "x", ["d", "age"], ["d"], date="date")


def _row(stats, h=H):
    fit = fit_jump(stats, "d", C, h)
    return {"running": "x", "treatment": "d", "cutoff": C, "bandwidth": h, "kernel": "triangular",
            "degree": 1, "right_closed": True, **{k: getattr(fit, k) for k in (
                "jump", "se", "left", "right", "ci_low", "ci_high", "n_left", "n_right")}}


def _wls(df, c, h):
    # Reference: statsmodels WLS y ~ 1 + D + u + D·u, triangular weights, cov_type HC1.
    u = df.x.to_numpy() - c
    w = np.clip(1 - np.abs(u) / h, 0, None)
    m = w > 0
    D = (u >= 0).astype(float)
    Z = np.column_stack([np.ones_like(u), D, u, D * u])[m]
    return sm.WLS(df.d.to_numpy()[m], Z, weights=w[m]).fit(cov_type="HC1")


def test_uptake_bins_match_rows_and_are_safe(planted, stats):
    row = _row(stats)
    p = uptake_plot(stats, row, 11)
    assert p["bins"] and {b["side"] for b in p["bins"]} == {"left", "right"}
    x, d = planted.x.to_numpy(), planted.d.to_numpy()
    end = max(b["x_high"] for b in p["bins"])
    assert p["merged_bins"] >= 1          # the sparse outer left bin (few ones) was merged
    for b in p["bins"]:
        # bins are [x_low, x_high) (the outermost right bin also holds its outer edge); rows
        # at the cutoff belong to the right
        top = (x <= b["x_high"] + 1e-9) if b["x_high"] == end else (x < b["x_high"] - 1e-9)
        m = (x >= b["x_low"] - 1e-9) & top & ((x >= C) == (b["side"] == "right"))
        # Reference: plain row-level counts and means of the raw rows in the bin.
        assert b["n"] == m.sum()
        assert_allclose(b["mean"], d[m].mean(), rtol=1e-12)
        assert_allclose(b["x"], x[m].mean(), rtol=1e-12)
        ones = d[m].sum()
        assert b["n"] >= 11 and (ones == 0 or ones >= 11) and (b["n"] - ones == 0 or b["n"] - ones >= 11)


def test_uptake_lines_meet_the_jump_and_bands_give_its_se(planted, stats):
    row = _row(stats)
    p = uptake_plot(stats, row, 11)
    L, R = p["line_left"], p["line_right"]
    assert L["x"][0] == C and R["x"][0] == C
    assert_allclose(R["y"][0] - L["y"][0], row["jump"], rtol=1e-10)
    ref = _wls(planted, C, H)
    # Reference: statsmodels WLS/HC1 jump and its SE; the two band half-widths at the cutoff
    # combine to the jump's SE because the sides are independent fits.
    assert_allclose(R["y"][0] - L["y"][0], ref.params[1], rtol=1e-9)
    hl, hr = (L["high"][0] - L["low"][0]) / 2, (R["high"][0] - R["low"][0]) / 2
    assert_allclose(np.hypot(hl, hr) / Z95, ref.bse[1], rtol=1e-9)
    # drawn out to the last support points with positive kernel weight (one-decimal data)
    assert_allclose([L["x"][-1], R["x"][-1]], [C - H + 0.1, C + H - 0.1])
    # What is drawn is what was computed.
    fig = figures.uptake_figure({**row, "plot": p}, "points")
    ax = fig.axes[0]
    drawn = {a.get_gid(): a for a in ax.collections + ax.lines}
    left = [(b["x"], b["mean"]) for b in p["bins"] if b["side"] == "left"]
    assert_allclose(drawn["bins-left"].get_offsets(), left)
    assert_allclose(drawn["line-right"].get_ydata(), R["y"])
    assert ax.get_xlabel() == "x (points)"


def test_imse_bins_follow_the_published_rate():
    # Reference: METHODS §12 (after CCT 2015): J* = (R²·E[μ'(X)²]/(6σ²))^(1/3)·N^(1/3).
    # Planted μ(x) = x on [0, 1], σ = 1, X uniform: J* = (1/6)^(1/3)·N^(1/3) = 10 at N = 6000.
    rng = np.random.default_rng(3)
    for n, expect in ((6000, 10.0), (48_000, 20.0)):
        x = np.round(rng.random(n), 3)
        y = x + rng.normal(0, 1, n)
        st = binned(pd.DataFrame({"x": x, "y": y}), "x", ["y"])
        xs, nn, s1, s2 = st.column_sums("y")
        j = imse_bins(xs, nn, s1, s2, reach=1.0)
        assert abs(j - expect) / expect < 0.15, (n, j)


def test_density_histogram_and_fitted_curves(planted, stats):
    row = _row(stats)
    for m in (11, 400):
        p = density_plot(stats, row, m)
        x = planted.x.to_numpy()
        N = len(x)
        for b in p["bins"]:
            sel = (x >= b["x_low"] - 1e-7) & (x < b["x_high"] - 1e-7)
            # Reference: row-level histogram count in the displayed bin.
            assert b["n"] == sel.sum()
            assert b["n"] == 0 or b["n"] >= m
            assert_allclose(b["height"], b["n"] / (N * (b["x_high"] - b["x_low"])), rtol=1e-12)
    t = mccrary_test(stats, C)
    # The fitted one-sided densities end at the test's own estimates at the cutoff.
    assert_allclose(p["curve_left"]["y"][0], t.f_left, rtol=1e-10)
    assert_allclose(p["curve_right"]["y"][0], t.f_right, rtol=1e-10)
    # X ~ N(50, 15): the true density at the cutoff is 1/(15·√(2π)) = 0.0266 (scipy-free formula).
    assert_allclose([t.f_left, t.f_right], 1 / (15 * np.sqrt(2 * np.pi)), rtol=0.1)
    fig = figures.density_figure({**row, "plot_density": p}, "points")
    ax = fig.axes[0]
    bars = [r for r in ax.patches if r.get_gid() == "hist-right"] or \
        [c for c in ax.containers if c.get_gid() == "hist-right"][0].patches
    right = [b for b in p["bins"] if b["side"] == "right"]
    assert_allclose([r.get_height() for r in bars], [b["height"] for b in right])


def test_balance_figure_plots_the_standardised_jumps(stats):
    bal = covariate_balance(stats, ["age"], C, H)
    c = {**_row(stats), "balance": bal.covariates}
    fig = figures.balance_figure(c)
    ax = fig.axes[0]
    pts = [a for a in ax.collections if a.get_gid() == "std-jumps"][0].get_offsets()
    assert_allclose(pts[:, 0], [b["std_jump"] for b in bal.covariates])
    iv = [a for a in ax.lines if a.get_gid() == "interval-age"][0]
    assert_allclose(iv.get_xdata(), [bal.covariates[0]["std_ci_low"], bal.covariates[0]["std_ci_high"]])
    # the planted age slope is smooth, so its standardised jump is near zero
    assert abs(bal.covariates[0]["std_jump"]) < 0.1


def test_sensitivity_points_equal_rowlevel_fits(planted, stats):
    row = _row(stats)
    pts = sensitivity_plot(stats, row)
    assert [q["factor"] for q in pts] == [0.5, 0.75, 1.0, 1.25, 1.5, 2.0]
    for q in pts:
        ref = _wls(planted, C, q["bandwidth"])   # Reference: statsmodels WLS HC1
        assert_allclose(q["jump"], ref.params[1], rtol=1e-9)
        assert_allclose(q["ci_high"] - q["ci_low"], 2 * Z95 * ref.bse[1], rtol=1e-9)
    fig = figures.sensitivity_figure(row, pts, "points")
    sc = [a for a in fig.axes[0].collections if a.get_gid() == "sensitivity"][0]
    assert_allclose(sc.get_offsets(), [[q["bandwidth"], q["jump"]] for q in pts])
    filled = [tuple(fc) != (1, 1, 1, 1) for fc in sc.get_facecolors()]
    assert filled == [q["factor"] == 1.0 for q in pts]


def test_timeline_per_year_equals_fits_on_that_years_rows(planted, stats):
    row = _row(stats)
    pts = timeline_plot(stats, row, 11)
    assert [q["year"] for q in pts] == [2019, 2020, 2021, 2022]
    for q in pts:
        ref = _wls(planted[planted.date.dt.year == q["year"]], C, H)   # statsmodels, that year only
        assert_allclose(q["jump"], ref.params[1], rtol=1e-9)
    fig = figures.timeline_figure(row, [{"label": q["year"], **q} for q in pts])
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["2019", "2020", "2021", "2022"]
    assert_allclose([a for a in ax.lines if a.get_gid() == "timeline"][0].get_ydata(),
                    [q["jump"] for q in pts])


def _results(cands):
    return {"title": "t", "version": "1.0", "spec": {"running": [{"column": "x", "unit": "points"}],
            "top": 5, "treatments": ["d"]}, "data": {"rows_read": 100, "rows_used": 100, "dropped": []},
            "n_candidates": len(cands), "n_tested": len(cands),
            "disclosure": {"min_cell": 11, "suppressed_counts": 0}, "notes": [], "candidates": cands}


def test_optional_sections_appear_only_with_their_fields(stats):
    base = {**_row(stats), "rank": 1, "origin": "round", "rule_id": None, "q_value": 0.001,
            "first_stage_f": 50.0, "verdict": "usable", "flags": [], "reasons": ["a reason"],
            "score": 80.0, "density_p": 0.5, "balance_p": 0.5}
    plain = render(_results([base]))
    for marker in ("class='compliance'", "class='placebo'", "class='power'", "class='density-tests'"):
        assert marker not in plain
    full = render(_results([{**base, "share_always": 0.1, "share_never": 0.5, "share_compliers": 0.4,
                             "placebo_p": 0.3, "power": {"mde": 0.05, "power": 0.8},
                             "density_tests": [{"method": "local polynomial", "p_value": 0.4}],
                             "ci_low_robust": 0.3, "ci_high_robust": 0.5}]))
    for marker in ("class='compliance'", "class='placebo'", "class='power'", "class='density-tests'",
                   "compliers 40%", "robust"):
        assert marker in full
    assert "a reason" in full and "Read this first" in full
