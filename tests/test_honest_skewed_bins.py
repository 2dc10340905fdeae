"""Skewed running variable: bins next to a declared cutoff keep the binning pass's resolution.

Invented simulation: a lognormal(0, 2) score with a declared cutoff of 0.1 in its dense lower
part, where one 1-2-5 width for the whole (long-tailed) range leaves a single bin below the
cutoff.  References: statsmodels WLS on the rows (uniform kernel, the same bandwidth, rows
inside the window), within the reported binning-error bound; exact agreement (1e-9) where the
neighbourhood is exact-support.
"""
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from scanner.binerror import binning_error
from scanner.engines import BinPlan, bin_table, grid, settle
from scanner.estimate import fit_jump
from scanner.io import open_table

from .test_engines import assert_same_stats

C = 0.1
# Plans scaled down with the data so the final grid is coarse at the cutoff: "fine" ends the
# pass on the 0.01 grid and settles on width 0.1; "exact" stays exact-support during the pass
# (values recorded to 1e-4) and settles on a width far wider than 0.1.
PLANS = {"fine": dict(fine_keys=5000, max_bins=1000),
         "exact": dict(max_exact=1000, max_bins=200)}


def _design(kind, n=20_000, seed=7):
    rng = np.random.default_rng(seed)
    x = rng.lognormal(0.0, 2.0, n)
    if kind == "exact":
        x = np.round(x, 4)
    d = (rng.random(n) < 0.2 + 0.4 * (x >= C) + 0.2 * (1 - np.exp(-x))).astype(float)
    return pd.DataFrame({"x": x, "d": d})


def _bins(df, kind, right_closed=True, **kw):
    plan = BinPlan(("x",), ("d",), ("d",), edges={"x": ((C, right_closed),)}, **PLANS[kind], **kw)
    return bin_table(open_table(df), plan).stats["x"]


def _rowlevel_uniform(x, y, c, h_left, h_right, right_closed=True):
    """statsmodels WLS of y on (1, D, u, D·u), HC1, over the rows with −1 < u/h_left and
    u/h_right < 1 (uniform kernel, u = x − c), the window of the binned fit."""
    u = x - c
    m = (u / h_left > -1) & (u / h_right < 1)
    D = (u >= 0 if right_closed else u > 0).astype(float)
    Z = np.column_stack([np.ones_like(u), D, u, D * u])[m]
    return sm.WLS(y[m], Z, weights=np.full(m.sum(), 0.5)).fit(cov_type="HC1")


@pytest.mark.parametrize("kind", list(PLANS))
def test_bins_next_to_the_cutoff_are_finer_than_the_grid(kind):
    st = _bins(_design(kind), kind)
    assert st.kind == "width" and st.width >= 0.1     # the global width: one bin below 0.1
    lo, hi = st.bounds()
    left, right = hi <= C, lo >= C
    assert not st.straddles(C)
    # At least five bins a side within 0.05 of the cutoff, each narrower than the grid width
    # (the old settling left one bin, [0, 0.1), below the cutoff).
    near_l = left & (lo >= C - 0.05 - 1e-12)
    near_r = right & (hi <= C + 0.05 + 1e-12)
    assert near_l.sum() >= 5 and near_r.sum() >= 5
    assert ((hi - lo)[near_l | near_r] < st.width / 5).all()
    if kind == "fine":      # the pass's 0.01 grid, exactly
        assert_allclose((hi - lo)[near_l | near_r], 0.01, rtol=1e-9)
    else:                   # one recorded value per bin
        vx = st.sxx - st.sx ** 2 / st.n
        assert (np.abs(vx[near_l | near_r]) <= 1e-12 * st.sxx[near_l | near_r]).all()


def test_jump_from_refined_bins_is_the_rowlevel_fit_within_its_bound():
    # Reference: statsmodels WLS on the rows, uniform kernel.  The window ends on edges of the
    # pass's 0.01 grid in double arithmetic (h_left = 0.1 − 0.02, h_right = 0.18 − 0.1), so no
    # bin is cut by the window's edge.  The bins are 0.01 wide, so the fits differ by the
    # within-bin spread of x; that difference is within the reported bound.  The bound is mostly
    # its noise part at Z_BOUND = 3 standard deviations, about 3 × 0.9 × (bin width / h) SE per
    # side for this kernel (our first-order estimate), so with eight bins a side it stays below
    # half an SE — where one bin below the cutoff left the fit not estimable at all.
    df = _design("fine")
    st = _bins(df, "fine")
    hl, hr = C - 0.02, 0.18 - C
    ref = _rowlevel_uniform(df.x.to_numpy(), df.d.to_numpy(), C, hl, hr)
    fit = fit_jump(st, "d", C, hl, kernel="uniform", bandwidth_right=hr)
    bound, why = binning_error(st, "d", C, hl, hr, "uniform", 1)
    assert why is None
    assert abs(fit.jump - ref.params[1]) <= bound < 0.5 * ref.bse[1]
    assert abs(fit.se / ref.bse[1] - 1) < 0.01


@pytest.mark.parametrize("right_closed", [True, False])
def test_exact_support_neighbourhood_gives_the_rowlevel_fit_exactly(right_closed):
    # Reference: statsmodels WLS on the rows (uniform kernel, HC1).  The window (0.07495,
    # 0.12505) lies inside the refined neighbourhood, where every bin holds one recorded value,
    # so the binned fit is the row-level one to rounding.  Five rows lie at 0.1 itself: a
    # left-closed rule keeps them on the left.
    df = _design("exact")
    assert (df.x == C).sum() > 0
    st = _bins(df, "exact", right_closed)
    h = 0.02505
    lo, hi = st.bounds()
    inside = (hi > C - h) & (lo < C + h)
    assert (st.sxx - st.sx ** 2 / st.n)[inside].max() <= 1e-15     # one value per bin
    ref = _rowlevel_uniform(df.x.to_numpy(), df.d.to_numpy(), C, h, h, right_closed)
    fit = fit_jump(st, "d", C, h, kernel="uniform", right_closed=right_closed)
    assert_allclose(fit.jump, ref.params[1], rtol=1e-9)
    assert_allclose(fit.se, ref.bse[1], rtol=1e-9)


@pytest.mark.parametrize("kind", list(PLANS))
def test_refined_bins_do_not_depend_on_batches_order_or_kernel(kind):
    df = _design(kind)
    ref = _bins(df, kind)
    shuffled = df.sample(frac=1, random_state=2)
    ordered = df.sort_values("x", kind="stable")
    for frame, rows, kernel in ((df, 7001, "compiled"), (shuffled, 2500, "sparse"),
                                (ordered, 3333, "bincount")):
        assert_same_stats(_bins(frame, kind, batch_rows=rows, kernel=kernel), ref)


def test_added_edges_are_capped_nearest_first(monkeypatch):
    # With small caps: at most REFINE_EDGES edges per side of the cutoff, the nearest ones, and
    # at most PART_ROOM added edges inside one final bin.
    monkeypatch.setattr(settle, "REFINE_EDGES", 4)
    monkeypatch.setattr(settle, "PART_ROOM", 6)
    st = _bins(_design("fine"), "fine")
    added = sorted(v for v, _ in st.edges if v != C)
    assert len(added) == 8
    assert_allclose(added, [0.06, 0.07, 0.08, 0.09, 0.11, 0.12, 0.13, 0.14], rtol=1e-12)
    monkeypatch.setattr(settle, "REFINE_EDGES", 400)
    st = _bins(_design("fine"), "fine")
    k = grid.keys(np.array([v for v, _ in st.edges]), *grid.grid_of_width(st.width))
    assert np.bincount(k - k.min()).max() <= 6 + 1        # + the declared cutoff


def test_added_edges_for_many_cutoffs_stay_within_max_bins():
    # Fifty declared cutoffs on one variable: the edges added for all of them together stay
    # within plan.max_bins (those nearest a cutoff kept), so the bins cannot multiply.
    df = _design("fine", n=30_000, seed=3)
    cuts = tuple((float(c), True) for c in np.round(np.linspace(0.05, 40, 50), 2))
    plan = BinPlan(("x",), ("d",), ("d",), edges={"x": cuts}, **PLANS["fine"])
    st = bin_table(open_table(df), plan).stats["x"]
    declared = {c for c, _ in cuts}
    added = [v for v, _ in st.edges if v not in declared]
    assert 0 < len(added) <= PLANS["fine"]["max_bins"]
    assert st.n_bins <= 3 * PLANS["fine"]["max_bins"]
