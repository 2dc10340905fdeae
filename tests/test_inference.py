"""Robust bias-corrected, bias-aware and bandwidth computations against outside references.

References: statsmodels WLS with HC1/HC2/HC3 on the raw rows; row-level numpy computations of
the same published formulas; scipy distributions for critical values.
"""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize, stats as sps

from benchmarks.coverage_designs import to_bins
from scanner.estimate.inference import fuzzy_inference, joint_side_data
from scanner.estimate import side_data
from scanner.estimate.bandwidth import C_K, ik_bandwidth
from scanner.estimate.kernels import KERNELS
from scanner.estimate.mse import mse_bandwidth
from scanner.estimate.robust import (curvature_bound, honest_best, honest_cv, honest_interval,
                                     robust_fuzzy, robust_jump)
from scanner.estimate.select import donut, select_bandwidth, sensitivity

from .conftest import binned
from .test_equivalence import rowlevel


@pytest.fixture
def design(integer_design):
    df = integer_design
    st = binned(df, "x", ["d", "y"], ["d"], [("d", "y")])
    return df, st


# ------------------------------------------------------------------ ρ = h/b = 1 identity
@pytest.mark.parametrize("kernel", list(KERNELS))
@pytest.mark.parametrize("vce", ["hc1", "hc2", "hc3"])
def test_rho_one_is_local_quadratic(design, kernel, vce):
    # Reference: statsmodels WLS degree 2 (y ~ D + x + x² + D·x + D·x²) with the same kernel
    # weights and cov_type = HC1/HC2/HC3. CCT (2014): with b = h the bias-corrected local linear
    # estimate is the local quadratic one and the robust variance its sandwich (METHODS.md §3.6).
    df, st = design
    for c, h in ((0.0, 17.0), (5.0, 23.5)):
        ref = rowlevel(df.x.to_numpy(), df.y.to_numpy(), c, h, kernel, 2)
        ref = ref.model.fit(cov_type=vce.upper())
        fit = robust_jump(side_data(st, "y", c), h, h, kernel, vce=vce)
        assert_allclose(fit.jump_bc, ref.params[1], rtol=1e-10)
        assert_allclose(fit.se_robust, ref.bse[1], rtol=1e-10)


def test_conventional_part_equals_statsmodels_local_linear(design):
    # Reference: statsmodels WLS degree 1, HC1 (the conventional estimate and SE).
    df, st = design
    ref = rowlevel(df.x.to_numpy(), df.y.to_numpy(), 0.0, 14.0, "triangular", 1)
    fit = robust_jump(side_data(st, "y", 0.0), 14.0, 25.0, vce="hc1")
    assert_allclose(fit.jump, ref.params[1], rtol=1e-10)
    assert_allclose(fit.se, ref.bse[1], rtol=1e-10)


def _rows_bc(x, y, h, b):
    """Row-level numpy: bias-corrected weights ℓ − κm, HC3 residuals of the quadratic at b."""
    tau, var = 0.0, 0.0
    for sign, side in ((-1, x < 0), (1, x >= 0)):
        u, ys = x[side], y[side]
        wh = np.clip(1 - np.abs(u) / h, 0, None)
        wb = np.clip(1 - np.abs(u) / b, 0, None)
        Z1 = np.column_stack([np.ones_like(u), u])
        Z2 = np.column_stack([np.ones_like(u), u, u * u])
        A1 = (Z1 * wh[:, None]).T @ Z1
        A2 = (Z2 * wb[:, None]).T @ Z2
        ell = (np.linalg.inv(A1) @ (Z1 * wh[:, None]).T)[0]
        m = (np.linalg.inv(A2) @ (Z2 * wb[:, None]).T)[2]
        kappa = ell @ (u * u)
        lbc = ell - kappa * m
        beta = np.linalg.solve(A2, (Z2 * wb[:, None]).T @ ys)
        e = ys - Z2 @ beta
        lev = wb * np.einsum("ij,jk,ik->i", Z2, np.linalg.inv(A2), Z2)
        inside = (wh > 0) | (wb > 0)
        tau += sign * lbc @ ys
        var += (lbc[inside] ** 2 * e[inside] ** 2 / (1 - lev[inside]) ** 2).sum()
    return tau, np.sqrt(var)


def test_bias_corrected_equals_rowlevel_numpy(design):
    # Reference: the CCT (2014) formulas of METHODS.md §3 items 2–5 computed on the raw rows.
    df, st = design
    x, y = df.x.to_numpy(), df.y.to_numpy()
    for h, b in ((12.0, 20.0), (20.0, 31.0), (15.0, 15.0)):
        tau, se = _rows_bc(x, y, h, b)
        fit = robust_jump(side_data(st, "y", 0.0), h, b, vce="hc3")
        assert_allclose(fit.jump_bc, tau, rtol=1e-10)
        assert_allclose(fit.se_robust, se, rtol=1e-10)


def test_fuzzy_rho_one_equals_quadratic_2sls(design):
    # Reference: just-identified weighted 2SLS (numpy) with controls (1, x, x², D·x, D·x²),
    # endogenous d, instrument D, HC1 sandwich (n/(n−6)): the ρ = 1 bias-corrected fuzzy ratio.
    df, st = design
    x, d, y = df.x.to_numpy(), df.d.to_numpy(), df.y.to_numpy()
    h = 25.0
    w = np.clip(1 - np.abs(x) / h, 0, None)
    m = w > 0
    D = (x >= 0).astype(float)
    ctrl = [np.ones_like(x), x, x * x, D * x, D * x * x]
    Z = np.column_stack([ctrl[0], D] + ctrl[1:])[m]
    X = np.column_stack([ctrl[0], d] + ctrl[1:])[m]
    W = w[m]
    ZW = Z.T * W
    beta = np.linalg.solve(ZW @ X, ZW @ y[m])
    e = y[m] - X @ beta
    B = np.linalg.inv(ZW @ X)
    V = B @ ((Z * (W ** 2 * e ** 2)[:, None]).T @ Z) @ B.T * m.sum() / (m.sum() - 6)
    dT, dY, sab = joint_side_data(st, "d", "y", 0.0)
    fit = robust_fuzzy(dT, dY, sab, h, h, vce="hc1")
    assert_allclose(fit.jump_bc, beta[1], rtol=1e-9)
    assert_allclose(fit.se_robust, np.sqrt(V[1, 1]), rtol=1e-9)


# ------------------------------------------------------------------ bias-aware intervals
def test_honest_critical_value_matches_scipy_and_published_value():
    # Armstrong & Kolesár (2020, Quantitative Economics 11(1)), abstract verified (METHODS.md
    # §7c): at rate n^(-2/5) the 95% critical value is 2.18 (t = 1/2) instead of 1.96.
    assert_allclose(honest_cv(0.5), 2.18, atol=0.005)
    assert_allclose(honest_cv(0.0), sps.norm.ppf(0.975), rtol=1e-12)
    for t in (0.1, 0.25, 0.5, 1.0, 2.0, 4.0):
        # scipy: root of Φ(c − t) − Φ(−c − t) = 0.95 (definition of the |N(t,1)| quantile).
        root = optimize.brentq(lambda c: sps.norm.cdf(c - t) - sps.norm.cdf(-c - t) - 0.95, 0, 20)
        assert_allclose(honest_cv(t), root, rtol=1e-8)
    # METHODS.md §7c derived values (t = 1 → 2.646, t = 2 → 3.645).
    assert_allclose([honest_cv(1.0), honest_cv(2.0)], [2.646, 3.645], atol=5e-4)
    # The direct scipy.special call is the value scipy.stats.ncx2.ppf gives, to the last bit.
    for t in np.linspace(1e-6, 12.0, 301):
        assert honest_cv(t) == float(np.sqrt(sps.ncx2.ppf(0.95, 1, t * t)))
    # Past t = 20 the closed form t + Φ⁻¹(0.95) (the other tail is below double precision):
    # equal to scipy's noncentral χ² where that is finite, and finite where it is not (NaN
    # from t ≈ 3·10^5 in scipy).
    for t in (20.0 + 1e-9, 50.0, 1e3, 1e5):
        assert_allclose(honest_cv(t), np.sqrt(sps.ncx2.ppf(0.95, 1, t * t)), rtol=1e-14)
    for t in (1e6, 1e8):
        assert_allclose(honest_cv(t), t + sps.norm.ppf(0.95), rtol=1e-15)
    assert abs(honest_cv(20.0 - 1e-9) - honest_cv(20.0 + 1e-9)) < 1e-8       # continuous at 20


def test_honest_interval_equals_rowlevel(design):
    # Reference: worst-case bias under |μ''| ≤ M (Armstrong & Kolesár 2018), M·∫|Σ ℓ_i(|x_i| − t)₊|dt
    # from row-level numpy weights integrated by scipy quad; conventional HC3 SE from
    # statsmodels, cv from scipy's noncentral χ².
    df, st = design
    x, y = df.x.to_numpy(), df.y.to_numpy()
    h, M = 16.0, 0.002
    bias = 0.0
    for side in (x < 0, x >= 0):
        u = x[side]
        w = np.clip(1 - np.abs(u) / h, 0, None)
        Z = np.column_stack([np.ones_like(u), u])
        ell = (np.linalg.inv((Z * w[:, None]).T @ Z) @ (Z * w[:, None]).T)[0]
        a = np.abs(u)
        G = lambda t: abs(float(ell @ np.clip(a - t, 0, None)))
        bias += M * integrate.quad(G, 0, a.max(), points=np.unique(a)[:-1], limit=500)[0]
    ref = rowlevel(x, y, 0.0, h, "triangular", 1).model.fit(cov_type="HC3")
    cv = np.sqrt(sps.ncx2.ppf(0.95, 1, (bias / ref.bse[1]) ** 2))
    hon = honest_interval(side_data(st, "y", 0.0), h, M)
    assert_allclose(hon.max_bias, bias, rtol=1e-8)
    assert_allclose([hon.ci_low, hon.ci_high],
                    [ref.params[1] - cv * ref.bse[1], ref.params[1] + cv * ref.bse[1]], rtol=1e-9)


def test_curvature_bound_recovers_a_quadratic():
    # Invented noiseless curve: μ'' = 6 left and −4 right, so the rule of thumb gives M = 6.
    x = np.repeat(np.arange(-10, 11) / 10.0, 5)
    y = np.where(x >= 0, 1 - 2 * x * x, 3 * x * x)
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    assert_allclose(curvature_bound(d), 6.0, rtol=1e-8)


def test_honest_best_picks_the_shortest(design):
    df, st = design
    d = side_data(st, "y", 0.0)
    best, h = honest_best(d, 0.002)
    for g in (5.5, 10.5, 20.5, 30.5):
        other = honest_interval(d, g, 0.002)
        assert best.ci_high - best.ci_low <= other.ci_high - other.ci_low + 1e-12
    assert np.isfinite(h)


# ------------------------------------------------------------------ bandwidth selectors
def _small_example():
    rng = np.random.default_rng(42)
    x = np.round(rng.uniform(-1, 1, 400), 2)
    y = 0.3 + 0.8 * x + 1.5 * x ** 2 * (x < 0) - 2.0 * x ** 3 + 0.4 * (x >= 0) + rng.normal(0, 0.3, 400)
    return x, y


def _wls(u, y, w, deg):
    Z = np.vander(u, deg + 1, increasing=True)
    A = (Z * w[:, None]).T @ Z
    L = np.linalg.solve(A, (Z * w[:, None]).T)
    return L, Z


def test_mse_bandwidth_hand_worked():
    # Hand-worked, row by row with numpy, following the steps documented in scanner/estimate/mse.py
    # (CCT 2014 structure: pilot c, order-(q+1) derivative, pilot b, regularised h).
    x, y = _small_example()
    N = x.size
    tri = lambda v: np.clip(1 - np.abs(v), 0, None)  # noqa: E731
    # Step 0: pilot c = 1.84 · S_X · N^(-1/5) (widening not needed here; checked below).
    c = 1.84 * x.std(ddof=1) * N ** -0.2
    for side in (x < 0, x >= 0):
        assert np.unique(np.abs(x[side] * (np.abs(x[side]) < c))).size > 5
    pieces = []
    for sign, side in ((-1, x < 0), (1, x >= 0)):
        u, ys = x[side], y[side]
        # Step 1: third derivative from a global quintic on the side.
        g = np.polynomial.polynomial.polyfit(u, ys, 5)
        d3 = 6 * g[3]
        # At c: local linear weights ℓ, κ = Σ ℓ u², quadratic x²-weights m with residuals.
        w = tri(u / c)
        L1, Z1 = _wls(u, ys, w, 1)
        L2, Z2 = _wls(u, ys, w, 2)
        e1 = ys - Z1 @ (L1 @ ys)
        e2 = ys - Z2 @ (L2 @ ys)
        kappa = L1[0] @ (u * u)
        var_p = (L1[0] ** 2 * e1 ** 2).sum()
        var_m = (L2[2] ** 2 * e2 ** 2).sum()
        shift = L2[2] @ u ** 3
        pieces.append(dict(u=u, y=ys, sign=sign, kappa=kappa, var_p=var_p, var_m=var_m,
                           bias_m=shift * d3 / 6))
    # Step 2: b^7 = 5·V_b(c)·c^5 / (2·(B_b(c)/c)²) for the common bias term.
    Vb = sum(p["kappa"] ** 2 * p["var_m"] for p in pieces)
    Bb = sum(p["sign"] * p["kappa"] * p["bias_m"] for p in pieces)
    b = (5 * Vb * c ** 5 / (2 * (Bb / c) ** 2)) ** (1 / 7)
    # Step 3: β₂ at b, bias constant, regulariser 3·Var(B̂), h^5 = V(c)·c / (4(B² + R)).
    B = R = V = 0.0
    for p in pieces:
        w = tri(p["u"] / b)
        L2, Z2 = _wls(p["u"], p["y"], w, 2)
        e2 = p["y"] - Z2 @ (L2 @ p["y"])
        B += p["sign"] * p["kappa"] * (L2[2] @ p["y"]) / c ** 2
        R += 3 * p["kappa"] ** 2 * (L2[2] ** 2 * e2 ** 2).sum() / c ** 4
        V += p["var_p"] * c
    h = (V / (4 * (B * B + R))) ** 0.2
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    got = mse_bandwidth(d)
    assert_allclose([got.pilot, got.b_left, got.h_left], [c, b, h], rtol=1e-8)
    # CER: h · N^(-1/20) (Calonico, Cattaneo & Farrell 2020, p = 1).
    assert_allclose(mse_bandwidth(d, cer=True).h_left, h * N ** -0.05, rtol=1e-8)
    # Per side: h_s^5 = V_s(c)·c / (4(B_s² + R_s)) with b_s from the side's own pieces.
    sides = mse_bandwidth(d, per_side=True)
    assert sides.h_left != sides.h_right and np.isfinite(sides.h_left)


def test_ik_bandwidth_hand_worked_steps():
    # Imbens & Kalyanaraman (2012) steps 1 and 3 (METHODS.md §2) recomputed on the rows.
    x, y = _small_example()
    N = x.size
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    got = ik_bandwidth(None, None, 0.0, data=d)
    h1 = 1.84 * x.std(ddof=1) * N ** -0.2
    left, right = (x < 0) & (x >= -h1), (x >= 0) & (x <= h1)
    f = (left.sum() + right.sum()) / (2 * N * h1)
    s2 = (((y[left] - y[left].mean()) ** 2).sum() + ((y[right] - y[right].mean()) ** 2).sum()) \
        / (left.sum() + right.sum())
    assert_allclose([got.h_pilot, got.density, got.sigma2], [h1, f, s2], rtol=1e-10)
    h = C_K["triangular"] * (2 * s2 / (f * ((got.m2_right - got.m2_left) ** 2 + got.reg_left
                                             + got.reg_right))) ** 0.2 * N ** -0.2
    assert_allclose(got.h, h, rtol=1e-10)


@pytest.mark.parametrize("method", ["mse", "cer", "ik", "mse-sides"])
def test_selectors_invariant_to_row_order_and_batching(method):
    x, y = _small_example()
    rng = np.random.default_rng(0)
    perm = rng.permutation(x.size)
    one = to_bins(x, {"y": y})
    shuffled = to_bins(x[perm], {"y": y[perm]})
    batched = to_bins(x[:150], {"y": y[:150]}).merge(to_bins(x[150:290], {"y": y[150:290]})) \
        .merge(to_bins(x[290:], {"y": y[290:]}))
    name, per_side = method.split("-")[0], method.endswith("sides")
    out = [select_bandwidth(side_data(s, "y", 0.0), name, per_side=per_side)
           for s in (one, shuffled, batched)]
    for o in out[1:]:
        assert_allclose([o.h_left, o.h_right, o.b_left, o.b_right],
                        [out[0].h_left, out[0].h_right, out[0].b_left, out[0].b_right], rtol=1e-9)
    assert out[0].method.startswith(name)


def test_fixed_bandwidth_uses_rho_one():
    x, y = _small_example()
    sel = select_bandwidth(side_data(to_bins(x, {"y": y}), "y", 0.0), 0.3)
    assert (sel.h_left, sel.b_left, sel.method) == (0.3, 0.3, "fixed")


# ------------------------------------------------------------------ sensitivity
def test_sensitivity_runs_and_donut():
    x, y = _small_example()
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    dd = donut(d, 1)
    assert np.abs(dd.u).min() == np.unique(np.abs(d.u))[1]
    sel = select_bandwidth(d, "mse")
    runs = sensitivity(d, sel)
    assert [r["variant"] for r in runs] == ["h×0.5", "h×0.75", "h×1", "h×1.5", "h×2", "donut 1",
                                            "donut 2"]
    again = robust_jump(d, 2 * sel.h_left, 2 * sel.b_left)
    assert_allclose(runs[4]["jump"], again.jump, rtol=1e-12)


def test_fuzzy_bandwidth_is_the_sharp_one_on_the_linearised_outcome(design):
    # METHODS.md §1/§2 (fuzzy): one bandwidth for Y − τ̃T, τ̃ the conventional ratio at the pilot.
    # Reference: rows z = y − τ̃·d binned afresh, then the sharp selector.
    from scanner.estimate.mse import fuzzy_side_data, pilot_ratio
    df, st = design
    dT, dY, sab = joint_side_data(st, "d", "y", 0.0)
    tau = pilot_ratio(dT, dY)
    z = df.y.to_numpy() - tau * df.d.to_numpy()
    ref = mse_bandwidth(side_data(to_bins(df.x.to_numpy(), {"z": z}), "z", 0.0))
    got = mse_bandwidth(fuzzy_side_data(dT, dY, sab, tau))
    assert_allclose([got.h_left, got.b_left], [ref.h_left, ref.b_left], rtol=1e-8)
    # The pilot ratio is the local Wald ratio at the pilot bandwidth (fit_fuzzy, tested vs 2SLS).
    from scanner.estimate import fit_fuzzy
    assert_allclose(tau, fit_fuzzy(st, "d", "y", 0.0, ref.pilot).effect, rtol=1e-10)


def test_per_side_bandwidths_hand_worked():
    # Per side (CCT 2014, one bandwidth per side): h_s^5 = V_s(c)·c / (4(B_s² + 3·Var B̂_s)),
    # recomputed from the common run's pilot c and each side's own b.
    x, y = _small_example()
    d = side_data(to_bins(x, {"y": y}), "y", 0.0)
    got = mse_bandwidth(d, per_side=True)
    c = got.pilot
    tri = lambda v: np.clip(1 - np.abs(v), 0, None)  # noqa: E731
    for side, b, h in ((x < 0, got.b_left, got.h_left), (x >= 0, got.b_right, got.h_right)):
        u, ys = x[side], y[side]
        L1, Z1 = _wls(u, ys, tri(u / c), 1)
        kappa = L1[0] @ (u * u)
        V = (L1[0] ** 2 * (ys - Z1 @ (L1 @ ys)) ** 2).sum() * c
        L2, Z2 = _wls(u, ys, tri(u / b), 2)
        e2 = ys - Z2 @ (L2 @ ys)
        B = kappa * (L2[2] @ ys) / c ** 2
        R = 3 * kappa ** 2 * (L2[2] ** 2 * e2 ** 2).sum() / c ** 4
        assert_allclose(h, (V / (4 * (B * B + R))) ** 0.2, rtol=1e-8)


def test_fuzzy_inference_wires_selection_and_robust_fit(design):
    # fuzzy_inference = selector on the linearised outcome + robust_fuzzy at those bandwidths.
    from scanner.estimate.mse import fuzzy_side_data, pilot_ratio
    df, st = design
    fit, sel = fuzzy_inference(st, "d", "y", 0.0)
    dT, dY, sab = joint_side_data(st, "d", "y", 0.0)
    ref_sel = select_bandwidth(fuzzy_side_data(dT, dY, sab, pilot_ratio(dT, dY)), "mse")
    assert_allclose(sel.h + sel.b, ref_sel.h + ref_sel.b, rtol=1e-12)
    ref = robust_fuzzy(dT, dY, sab, sel.h, sel.b)
    assert_allclose([fit.jump, fit.jump_bc, fit.se_robust], [ref.jump, ref.jump_bc, ref.se_robust],
                    rtol=1e-12)
    fixed, fsel = fuzzy_inference(st, "d", "y", 0.0, bandwidth=20.0)
    assert fsel.method == "fixed" and fsel.b_left == 20.0


def test_honest_interval_needs_degree_one_or_more(design):
    # A bound on μ'' does not bound the bias of local constant weights (they leave the slope).
    df, st = design
    assert np.isnan(honest_interval(side_data(st, "y", 0.0), 16.0, 0.002, p=0).ci_low)
    assert np.isfinite(honest_interval(side_data(st, "y", 0.0), 16.0, 0.002, p=2).ci_low)
