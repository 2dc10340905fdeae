"""Fits at many candidates of one running variable computed together (batch.fits_at) equal one
fit per candidate (local.fit_jump), and row-level statsmodels WLS."""
import numpy as np
import pytest
import statsmodels.api as sm

from scanner.diagnostics.balance import covariate_balance, covariate_balance_at
from scanner.engines.local import exact_bins
from scanner.estimate.batch import fits_at
from scanner.estimate.local import fit_jump

FIELDS = ("jump", "se", "z", "p_value", "ci_low", "ci_high", "left", "right", "slope_left",
          "slope_right")
COUNTS = ("n_left", "n_right", "distinct_left", "distinct_right", "cutoff", "bandwidth")


def _irregular(seed=8, n=4000):
    """Invented rows with what registries have: a half-integer lattice with a jump in uptake
    that is exactly 0 below the cutoff, a skewed covariate, a covariate missing on some rows
    (its own counts), a constant covariate and a coarse 0/1 covariate."""
    rng = np.random.default_rng(seed)
    x = np.round(rng.gamma(3.0, 4.0, n) * 2) / 2
    d = np.where(x >= 12, (rng.random(n) < 0.7), 0).astype(float)
    skew = rng.lognormal(0.0, 1.0, n) + 0.02 * x
    gap = rng.normal(size=n)
    gap[rng.random(n) < 0.2] = np.nan
    const = np.full(n, 4.0)
    flag = (rng.random(n) < 0.3 + 0.01 * x).astype(float)
    cols = {"d": d, "skew": skew, "gap": gap, "const": const, "flag": flag}
    return x, cols, exact_bins("x", x, cols)


# cutoffs on, between and beyond recorded values; bandwidths too small to fit, NaN and wide
POINTS = [(12.0, 3.0, True), (12.0, 3.0, False), (12.25, 4.0, True), (7.5, 0.6, True),
          (7.5, 0.5, True), (30.0, 6.0, False), (200.0, 5.0, True), (-1.0, 3.0, True),
          (15.0, float("nan"), True), (15.0, 0.0, True), (20.5, 10.0, True), (3.0, 2.5, False)]


def _same(got, ref, what):
    assert got.reason == ref.reason, what
    for f in COUNTS:
        a, b = getattr(got, f), getattr(ref, f)
        assert a == b or (np.isnan(a) and np.isnan(b)), (what, f)
    # Sums in another order differ in the last bits; on a constant column the jump itself is
    # that rounding noise (about 1e-15 of the level), so z and p are compared to 1e-5.
    scale = max(abs(ref.left), abs(ref.right), 1.0) if np.isfinite(ref.left) else 1.0
    for f in FIELDS:
        a, b = getattr(got, f), getattr(ref, f)
        assert np.isnan(a) == np.isnan(b), (what, f, a, b)
        if np.isfinite(b):
            atol = 1e-5 if f in ("z", "p_value") else 1e-9 * scale
            np.testing.assert_allclose(a, b, rtol=1e-9, atol=atol, err_msg=f"{what} {f}")


@pytest.mark.parametrize("kernel", ["triangular", "uniform", "epanechnikov"])
@pytest.mark.parametrize("degree", [0, 1, 2])
def test_fits_at_equal_one_fit_per_candidate(kernel, degree):
    _, cols, st = _irregular()
    names = list(cols)
    c, h, rc = (np.array([p[i] for p in POINTS]) for i in range(3))
    got = fits_at(st, names, c, h, rc, kernel, degree)
    for i, (ci, hi, ri) in enumerate(POINTS):
        for j, name in enumerate(names):
            ref = fit_jump(st, name, ci, hi, kernel, degree, bool(ri))
            _same(got[i][j], ref, (kernel, degree, ci, hi, ri, name))
    # the design makes every kind of answer appear: fits, too few values, no data on a side
    reasons = {f.reason for row in got for f in row}
    assert None in reasons and len(reasons) >= 3


# The kernels written out from their textbook definitions on |u| < 1 (scale does not matter to
# WLS), not taken from scanner.estimate.kernels.
ROW_KERNELS = {"triangular": lambda u: 1 - np.abs(u), "uniform": lambda u: np.ones_like(u),
               "epanechnikov": lambda u: 0.75 * (1 - u * u)}


@pytest.mark.parametrize("kernel", ["triangular", "uniform", "epanechnikov"])
@pytest.mark.parametrize("degree", [0, 1, 2])
def test_fits_at_equal_row_level_statsmodels_wls(kernel, degree):
    # Reference: statsmodels WLS of y on (1, D, v^k, D·v^k for k = 1..degree) over the rows
    # inside each window, kernel weights, HC1 errors (Hahn, Todd & van der Klaauw 2001; White
    # 1980).  Bins are exact support, so the binned fit is the row-level fit.
    x, cols, st = _irregular(seed=3)
    pts = [(12.0, 6.0, True), (9.5, 5.0, False), (20.0, 8.0, True)]
    got = fits_at(st, ["d", "skew", "gap"], *zip(*pts), kernel=kernel, degree=degree)
    checked = 0
    for (cut, h, rc), fits in zip(pts, got):
        for name, fit in zip(("d", "skew", "gap"), fits):
            y = cols[name]
            v = x - cut
            inside = np.abs(v) < h
            w = np.where(inside, ROW_KERNELS[kernel](np.where(inside, v / h, 0.0)), 0.0)
            keep = inside & np.isfinite(y)
            D = (v >= 0 if rc else v > 0).astype(float)[keep]
            vk = v[keep]
            X = np.column_stack([np.ones(keep.sum()), D]
                                + [f for k in range(1, degree + 1) for f in (vk ** k, D * vk ** k)])
            if not np.isfinite(fit.jump):
                continue
            res = sm.WLS(y[keep], X, weights=w[keep]).fit(cov_type="HC1")
            np.testing.assert_allclose(fit.jump, res.params[1], rtol=1e-8, atol=1e-12)
            np.testing.assert_allclose(fit.se, res.bse[1], rtol=1e-7)
            checked += 1
    assert checked >= 6


def test_fits_at_singular_point_alone_is_not_estimable(monkeypatch):
    # A moment matrix that cannot be inverted (LinAlgError) for one point: that point alone is
    # "singular local fit", the other points are still fitted together, with their own numbers.
    from scanner.estimate import batch
    _, cols, st = _irregular(seed=5)
    pts = [(12.0, 3.0, True), (16.0, 4.8, True), (18.0, 4.0, True), (9.0, 3.0, False)]
    real = batch.side_fits

    def failing(V, K, sides, n, S1, S2, d):
        if np.any((np.abs(V) * (K > 0)).max(axis=1) > 4.2):    # the point at 16 (h = 4.8)
            raise np.linalg.LinAlgError("singular matrix")
        return real(V, K, sides, n, S1, S2, d)
    monkeypatch.setattr(batch, "side_fits", failing)
    got = fits_at(st, ["d", "flag"], *zip(*pts))
    for (cut, h, rc), row in zip(pts, got):
        for name, fit in zip(("d", "flag"), row):
            if cut == 16.0:
                assert fit.reason == "singular local fit" and np.isnan(fit.jump)
            else:
                _same(fit, fit_jump(st, name, cut, h, "triangular", 1, rc), (cut, name))


def test_fits_at_in_chunks_equals_all_at_once(monkeypatch):
    # Many candidates on many bins are fitted in chunks of points (memory stays bounded); the
    # numbers must not depend on the chunking.
    from scanner.estimate import batch
    _, cols, st = _irregular(seed=19)
    c, h, rc = (np.array([p[i] for p in POINTS]) for i in range(3))
    whole = fits_at(st, list(cols), c, h, rc)
    monkeypatch.setattr(batch, "CHUNK_CELLS", st.n_bins * len(cols) * 3)     # 3 points a chunk
    parts = fits_at(st, list(cols), c, h, rc)
    assert len(parts) == len(whole) == len(POINTS)
    for a_row, b_row in zip(parts, whole):
        for a, b in zip(a_row, b_row):
            _same(a, b, "chunked")


def test_fits_at_with_a_junk_score_far_away():
    # One row at 1e300 (a junk value) becomes the last bin; a candidate near the top of the
    # real values reaches it through the padding of the batched windows.  Its weight is 0, but
    # V² overflowed and 0·inf gave NaN ("too few rows ... for a standard error").
    x, cols, _ = _irregular(seed=17)
    x = np.r_[x, 1e300]
    cols = {k: np.r_[v, v[0]] for k, v in cols.items()}
    st = exact_bins("x", x, cols)
    pts = [(10.0, 9.0, True), (30.0, 3.0, True), (float(np.sort(x)[-2]) - 1.0, 2.0, True)]
    got = fits_at(st, ["d", "skew"], *zip(*pts))
    for (cut, h, rc), row in zip(pts, got):
        for name, fit in zip(("d", "skew"), row):
            _same(fit, fit_jump(st, name, cut, h, "triangular", 1, rc), (cut, name))


def test_balance_at_many_candidates_equals_one_by_one():
    # The scan's balance checks of all candidates of a running variable, computed together.
    _, cols, st = _irregular(seed=11)
    covs = ["skew", "gap", "const", "flag"]
    pts = [p for p in POINTS]
    got = covariate_balance_at(st, covs, *zip(*pts))
    for (cut, h, rc), g in zip(pts, got):
        ref = covariate_balance(st, covs, cut, h, "triangular", 1, rc)
        assert np.isnan(g.p_value) == np.isnan(ref.p_value)
        if np.isfinite(ref.p_value):
            np.testing.assert_allclose(g.p_value, ref.p_value, rtol=1e-9, atol=1e-5)
        for a, b in zip(g.covariates, ref.covariates):
            assert a["name"] == b["name"]
            assert a["reason"] == b["reason"]
            for k in ("jump", "se", "std_jump", "std_ci_low", "std_ci_high", "p_value"):
                assert np.isnan(a[k]) == np.isnan(b[k]), (cut, h, k)
                if np.isfinite(b[k]):       # the constant covariate's jump is rounding noise
                    loose = k == "p_value" and b["name"] == "const"
                    np.testing.assert_allclose(a[k], b[k], rtol=1e-9, atol=1e-5 if loose
                                               else 1e-9, err_msg=f"{cut} {k} {b['name']}")


def test_balance_at_with_a_covariate_listed_twice():
    # A spec may list a covariate twice; every listed position gets its fit (a lookup by name
    # filled the first and left the second empty, and the scan stopped with an internal error).
    _, cols, st = _irregular(seed=11)
    covs = ["skew", "gap", "skew"]
    pts = [p for p in POINTS]
    got = covariate_balance_at(st, covs, *zip(*pts))
    for (cut, h, rc), g in zip(pts, got):
        ref = covariate_balance(st, covs, cut, h, "triangular", 1, rc)
        assert [a["name"] for a in g.covariates] == [b["name"] for b in ref.covariates]
        for a, b in zip(g.covariates, ref.covariates):
            assert a["reason"] == b["reason"]
            for k in ("jump", "se", "p_value"):
                assert np.isnan(a[k]) == np.isnan(b[k])
                if np.isfinite(b[k]):
                    np.testing.assert_allclose(a[k], b[k], rtol=1e-9, atol=1e-12)


def test_scan_rows_equal_with_and_without_the_shared_work(monkeypatch):
    # The scan prepares each running variable's bandwidths and balance fits for all its
    # candidates at once (scanner.together); without it every candidate does its own.  Every
    # number of every row must agree (1e-9; p-values of noise-level jumps to 1e-5).
    import pandas as pd
    import scanner
    from scanner import together
    x, cols, _ = _irregular(seed=13, n=6000)
    age = np.random.default_rng(2).integers(40, 90, x.size).astype(float)
    df = pd.DataFrame({"x": x, "age": age, **cols})
    spec = {"running": [{"column": "x"}, {"column": "age"}],
            "treatments": {"columns": ["d", "flag"]},
            "covariates": {"columns": ["skew", "gap", "const"]},
            "search": {"round_numbers": True, "discover": False}}
    got = scanner.scan(spec, data=df).rows
    monkeypatch.setattr(together, "prepare", lambda cands, pooled, spec: {})
    ref = scanner.scan(spec, data=df).rows
    assert len(got) == len(ref) > 5
    assert sum(np.isfinite(r["balance_p"]) for r in ref) > 5
    for a, b in zip(got, ref):
        assert a.keys() == b.keys()
        for k, v in b.items():
            if isinstance(v, float) and np.isfinite(v):
                tol = 1e-5 if "p" in k.split("_") or k.endswith("_p") else 1e-9
                np.testing.assert_allclose(a[k], v, rtol=1e-9, atol=tol, err_msg=k)
            elif isinstance(v, float):
                assert np.isnan(a[k]), k
        assert len(a["balance"]) == len(b["balance"])
        for ca, cb in zip(a["balance"], b["balance"]):
            assert ca.keys() == cb.keys()
            for k, v in cb.items():
                if isinstance(v, float) and np.isfinite(v):
                    np.testing.assert_allclose(ca[k], v, rtol=1e-9,
                                               atol=1e-5 if k == "p_value" else 1e-9, err_msg=k)
                elif isinstance(v, float):
                    assert np.isnan(ca[k]), k
                else:
                    assert ca[k] == v, k
