"""Property-based tests (hypothesis) of binning and estimation on invented tables.

Properties: results do not depend on row order or on how rows are split into batches; merging
BinnedStats is associative and commutative; NaN and infinite values are excluded and counted;
extreme magnitudes (1e-300 to 1e300) and ties at the cutoff behave; counts never overflow.
Counts are compared exactly, floating sums to a relative 1e-9 (summation order differs).
"""
import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from scanner.bins import BinnedStats
from scanner.engines import BinPlan, bin_table
from scanner.estimate import fit_jump, ik_bandwidth, side_data
from scanner.io import Table, open_table

SETTINGS = settings(max_examples=60, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@st.composite
def tables(draw, min_rows=1, max_rows=250, nonfinite=False):
    """A running variable x (integers or decimals), a 0/1 treatment d and a covariate y."""
    n = draw(st.integers(min_rows, max_rows))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    if draw(st.booleans()):
        x = rng.integers(-30, 31, n).astype(float)
    else:
        x = np.round(rng.normal(0, 10, n), draw(st.integers(0, 3)))
    d = (rng.random(n) < 0.3 + 0.4 * (x >= 0)).astype(float)
    y = rng.normal(size=n) * 10.0 ** draw(st.integers(-3, 3))
    if nonfinite:
        for arr in (x, y):
            k = draw(st.integers(0, n))
            idx = rng.choice(n, k, replace=False)
            arr[idx] = rng.choice([np.nan, np.inf, -np.inf], k)
    return pd.DataFrame({"x": x, "d": d, "y": y})


PLAN = BinPlan(("x",), ("d", "y"), ("d",), (("d", "y"),))


def split_table(df: pd.DataFrame, cuts) -> Table:
    """The rows of ``df`` as record batches cut at the given positions."""
    edges = [0] + sorted(set(int(c) for c in cuts if 0 < c < len(df))) + [len(df)]

    def batches(cols, rows):
        for a, b in zip(edges[:-1], edges[1:]):
            yield pa.RecordBatch.from_pandas(df.iloc[a:b][cols], preserve_index=False)
    return Table("<split>", list(df.columns), batches, len(df))


def assert_same_stats(a: BinnedStats, b: BinnedStats):
    assert (a.kind, a.width, a.columns, a.pairs) == (b.kind, b.width, b.columns, b.pairs) or \
        (a.kind == b.kind == "exact")
    assert_array_equal(a.key, b.key)
    assert_array_equal(a.period, b.period)
    assert_array_equal(a.half, b.half)
    for f in ("n", "cnt", "pn"):
        assert_array_equal(getattr(a, f), getattr(b, f))
    for f in ("sx", "sxx", "s1", "s2", "pa", "pb", "paa", "pbb", "pab"):
        x, y = getattr(a, f), getattr(b, f)
        scale = max(float(np.nanmax(np.abs(x))) if x.size else 0.0, 1e-300)
        assert_allclose(x, y, rtol=1e-9, atol=1e-12 * scale)


def bin_df(df, plan=PLAN):
    return bin_table(open_table(df), plan)


# ---------------------------------------------------------------------- order and batches
@SETTINGS
@given(tables(), st.randoms(use_true_random=False))
def test_row_order_does_not_matter(df, rnd):
    perm = list(range(len(df)))
    rnd.shuffle(perm)
    a, b = bin_df(df), bin_df(df.iloc[perm].reset_index(drop=True))
    assert_same_stats(a.stats["x"], b.stats["x"])
    assert (a.rows_read, a.missing, a.nonfinite) == (b.rows_read, b.missing, b.nonfinite)


@SETTINGS
@given(tables(), st.lists(st.integers(0, 250), max_size=8))
def test_batch_split_does_not_matter_for_exact_bins(df, cuts):
    a = bin_df(df)
    b = bin_table(split_table(df, cuts), PLAN)
    assert_same_stats(a.stats["x"], b.stats["x"])
    assert (a.rows_read, a.missing, a.nonfinite) == (b.rows_read, b.missing, b.nonfinite)


@SETTINGS
@given(tables(min_rows=20), st.lists(st.integers(0, 250), max_size=8),
       st.sampled_from([0.5, 1.0, 2.5]))
def test_batch_split_does_not_matter_for_fixed_width_bins(df, cuts, width):
    plan = BinPlan(("x",), ("d", "y"), ("d",), (("d", "y"),), bin_width={"x": width})
    a = bin_df(df, plan)
    b = bin_table(split_table(df, cuts), plan)
    assert_same_stats(a.stats["x"], b.stats["x"])


def test_batch_split_does_not_matter_when_the_grid_is_settled():
    # The fixed-width grid depends only on the set of values (scanner/engines/grid.py), never on
    # which rows arrived first.
    df = pd.DataFrame({"x": np.arange(100, dtype=float), "d": 1.0, "y": 1.0})
    plan = BinPlan(("x",), ("d", "y"), ("d",), (("d", "y"),), max_exact=10, max_bins=7, fine_keys=20)
    a = bin_df(df, plan).stats["x"]                     # one batch
    b = bin_table(split_table(df, [15]), plan).stats["x"]   # 15 rows, then the rest
    assert a.kind == b.kind == "width"
    assert a.width == b.width
    assert_same_stats(a, b)


@SETTINGS
@given(tables(min_rows=40), st.lists(st.integers(0, 250), max_size=6), st.randoms(use_true_random=False))
def test_estimates_do_not_depend_on_order_or_split(df, cuts, rnd):
    perm = list(range(len(df)))
    rnd.shuffle(perm)
    a = bin_df(df).stats["x"]
    b = bin_table(split_table(df.iloc[perm].reset_index(drop=True), cuts), PLAN).stats["x"]
    for col in ("d", "y"):
        bw_a, bw_b = ik_bandwidth(a, col, 0.0), ik_bandwidth(b, col, 0.0)
        assert_allclose(bw_a.h, bw_b.h, rtol=1e-7, equal_nan=True)
        for h in (5.0, 12.0):
            fa, fb = fit_jump(a, col, 0.0, h), fit_jump(b, col, 0.0, h)
            assert fa.reason == fb.reason
            assert (fa.n_left, fa.n_right, fa.distinct_left, fa.distinct_right) == \
                (fb.n_left, fb.n_right, fb.distinct_left, fb.distinct_right)
            assert_allclose([fa.jump, fa.se], [fb.jump, fb.se], rtol=1e-7, atol=1e-10, equal_nan=True)


# ---------------------------------------------------------------------- merge algebra
@SETTINGS
@given(tables(), tables(), tables())
def test_merge_is_associative_and_commutative(d1, d2, d3):
    a, b, c = (bin_df(d).stats["x"] for d in (d1, d2, d3))
    left = a.merge(b).merge(c)
    right = a.merge(b.merge(c))
    assert_same_stats(left, right)
    assert_same_stats(a.merge(b), b.merge(a))
    assert_same_stats(left, bin_df(pd.concat([d1, d2, d3], ignore_index=True)).stats["x"])
    empty = BinnedStats.empty("x", a.columns, a.pairs)
    assert_same_stats(a.merge(empty), a)


# ---------------------------------------------------------------------- NaN and infinities
@SETTINGS
@given(tables(nonfinite=True))
def test_nan_and_inf_are_excluded_and_counted(df):
    res = bin_df(df)
    x, y = df["x"].to_numpy(), df["y"].to_numpy()
    assert res.missing["x"] == int(np.isnan(x).sum())
    assert res.nonfinite["x"] == int(np.isinf(x).sum())
    s = res.stats["x"]
    fin = np.isfinite(x)
    assert s.total == int(fin.sum())
    assert int(s.cnt[:, s.col("y")].sum()) == int((fin & np.isfinite(y)).sum())
    assert int(s.cnt[:, s.col("d")].sum()) == int(fin.sum())
    for f in ("sx", "sxx", "s1", "s2", "pa", "pb", "paa", "pbb", "pab"):
        assert np.isfinite(getattr(s, f)).all(), f
    assert_allclose(s.s1[:, s.col("y")].sum(), y[fin & np.isfinite(y)].sum(), rtol=1e-9, atol=1e-9)


# ---------------------------------------------------------------------- extreme magnitudes
@SETTINGS
@given(tables(min_rows=60), st.integers(-300, 300))
def test_extreme_magnitudes_bin_exactly(df, k):
    scale = 10.0 ** k
    scaled = df.assign(x=df["x"] * scale)
    s = bin_df(scaled).stats["x"]
    ref = bin_df(df).stats["x"]
    assert s.total == ref.total == len(df)
    assert_array_equal(np.sort(s.n), np.sort(ref.n))          # the same bins, whatever the scale
    assert_allclose(s.key, ref.key * scale, rtol=1e-12)


@SETTINGS
@given(tables(min_rows=80), st.integers(-150, 150))
def test_estimates_are_scale_free_over_a_wide_range(df, k):
    """The jump and its SE are invariant to the running variable's unit (h scales along)."""
    scale = 10.0 ** k
    a = bin_df(df).stats["x"]
    b = bin_df(df.assign(x=df["x"] * scale)).stats["x"]
    fa, fb = fit_jump(a, "d", 0.0, 10.0), fit_jump(b, "d", 0.0, 10.0 * scale)
    assert fa.reason == fb.reason
    assert_allclose([fa.jump, fa.se], [fb.jump, fb.se], rtol=1e-6, atol=1e-9, equal_nan=True)


def test_estimator_gives_a_reason_at_1e300():
    # |u| near 1e300 overflows the moments (u² is inf): no standard error, and the fit says why.
    x = np.r_[np.arange(-5, 0), np.arange(0, 5)] * 1e300
    df = pd.DataFrame({"x": np.repeat(x, 20), "d": np.tile([0.0, 1.0], 100), "y": 0.0})
    with np.errstate(all="ignore"):
        fit = fit_jump(bin_df(df).stats["x"], "d", 0.0, 6e300)
    assert np.isfinite(fit.jump) or fit.reason


@settings(max_examples=25, deadline=None)
@given(st.sampled_from([1e-300, 1e-200, 1e-160, 1e154, 1e200, 1e300]))
def test_scan_rows_at_extreme_magnitudes_are_values_or_reasons(scale):
    from scanner.scan import scan
    rng = np.random.default_rng(3)
    x = rng.integers(-20, 21, 3000).astype(float)
    df = pd.DataFrame({"x": x * scale, "d": (rng.random(3000) < 0.2 + 0.5 * (x >= 0)).astype(float)})
    spec = {"running": {"column": "x"}, "treatments": {"columns": ["d"]}}
    with np.errstate(all="ignore"):
        res = scan(spec, data=df)
    for r in res.rows:
        assert np.isfinite(r["jump"]) or r["reason"], r


# ---------------------------------------------------------------------- ties at the cutoff
@SETTINGS
@given(tables(min_rows=10), st.integers(-10, 10), st.booleans())
def test_ties_at_the_cutoff_go_to_the_declared_side(df, c, right_closed):
    s = bin_df(df).stats["x"]
    d = side_data(s, "d", float(c), right_closed)
    x = df["x"].to_numpy()
    on_right = (x >= c) if right_closed else (x > c)
    assert int(d.n[d.right].sum()) == int(on_right.sum())
    assert int(d.n[~d.right].sum()) == int((~on_right).sum())
    at = d.u == 0
    if at.any():
        assert d.right[at].all() == right_closed


# ---------------------------------------------------------------------- counts
def test_counts_are_int64_and_never_overflow():
    one = bin_df(pd.DataFrame({"x": [0.0, 1.0], "d": [0.0, 1.0], "y": [1.0, 2.0]})).stats["x"]
    assert one.n.dtype == np.int64 and one.cnt.dtype == np.int64 and one.pn.dtype == np.int64
    from dataclasses import replace
    big = replace(one, n=one.n * 2**40, cnt=one.cnt * 2**40, pn=one.pn * 2**40)
    acc = big
    for _ in range(2000):                   # 2000 × 2^40 ≈ 2.2e15 rows per bin, far beyond any table
        acc = acc.merge(big)
    assert_array_equal(acc.n, one.n * 2001 * 2**40)
    assert (acc.n > 0).all() and acc.validate() is acc


@SETTINGS
@given(st.integers(1, 40), st.integers(1, 2000))
def test_many_batches_count_exactly(k, m):
    df = pd.DataFrame({"x": np.arange(m, dtype=float) % 7, "d": 1.0, "y": 1.0})
    res = bin_table(split_table(df, np.linspace(0, m, k + 1)[1:-1]), PLAN)
    assert res.rows_read == m and res.stats["x"].total == m
    assert_array_equal(res.stats["x"].n, np.bincount((np.arange(m) % 7)))
