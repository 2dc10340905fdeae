"""Reading every supported format gives the same BinnedStats; bins add up across batches."""
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from scanner.engines import BinPlan, bin_table
from scanner.io import open_table
from scanner.diagnostics import mccrary_test


def frame(n=3000, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 60, n).astype(float)
    x[:7] = np.nan
    d = (rng.random(n) < 0.3 + 0.4 * (x >= 30)).astype(float)
    d[7:12] = np.nan
    return pd.DataFrame({"x": x, "d": d, "z": rng.normal(size=n)})


PLAN = BinPlan(("x",), ("d", "z"), ("d",))


def stats_of(src):
    return bin_table(open_table(src), PLAN).stats["x"]


def same(a, b):
    assert_array_equal(a.key, b.key)
    assert_array_equal(a.n, b.n)
    assert_array_equal(a.cnt, b.cnt)
    assert_allclose(a.s1, b.s1, rtol=1e-12)
    assert_allclose(a.s2, b.s2, rtol=1e-12)


def test_all_formats_agree(tmp_path):
    df = frame()
    ref = stats_of(df)
    df.to_csv(tmp_path / "t.csv", index=False)
    df.to_parquet(tmp_path / "t.parquet", index=False)
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, part in enumerate(df.iloc[k:k + 1000] for k in range(0, 3000, 1000)):
        part.to_parquet(folder / f"part-{i}.parquet", index=False)
    feather.write_feather(pa.Table.from_pandas(df, preserve_index=False), tmp_path / "t.feather")
    df.to_stata(tmp_path / "t.dta", write_index=False)
    for src in (tmp_path / "t.csv", tmp_path / "t.parquet", folder, tmp_path / "t.feather",
                tmp_path / "t.dta", pa.Table.from_pandas(df, preserve_index=False)):
        same(stats_of(src), ref)


def test_missing_values_are_counted_per_pair():
    df = frame()
    res = bin_table(open_table(df), PLAN)
    st = res.stats["x"]
    assert res.missing["x"] == 7
    assert st.total == len(df) - 7
    assert st.total - st.cnt[:, st.col("d")].sum() == 5      # treatment missing, x present


def test_batches_and_merge_add_up():
    df = frame(5000, 3)
    ref = stats_of(df)
    t = open_table(df)
    for rows in (1, 97, 1000):
        if rows == 1:
            small = open_table(df.iloc[:300])
            one = bin_table(type(small)(small.name, small.columns, lambda c, r: small._batches(c, 1)), PLAN).stats["x"]
            same(one, stats_of(df.iloc[:300]))
            continue
        batched = type(t)(t.name, t.columns, lambda c, r, rows=rows: t._batches(c, rows))
        same(bin_table(batched, PLAN).stats["x"], ref)
    a, b, c = (stats_of(df.iloc[k:k + 1700]) for k in (0, 1700, 3400))
    same(a.merge(b).merge(c), ref)
    same(a.merge(b.merge(c)), ref)


def test_continuous_variable_gets_fixed_width_grid_with_exact_moments():
    rng = np.random.default_rng(2)
    x = rng.normal(50, 10, 20000)
    df = pd.DataFrame({"x": x, "d": (x > 55).astype(float), "z": rng.normal(size=x.size)})
    st = stats_of(df)
    assert st.kind == "width" and st.n.sum() == x.size
    assert_allclose(st.sx.sum(), x.sum(), rtol=1e-12)
    assert_allclose(st.sxx.sum(), (x * x).sum(), rtol=1e-12)
    # 1-2-5 widths put round cutoffs on bin edges
    assert np.isclose(55 / st.width, round(55 / st.width))


def test_mccrary_matches_raw_row_histogram():
    # Reference: McCrary (2008) steps computed directly on raw rows with numpy (bins of width b
    # aligned on c, local linear with triangular kernel, θ = ln f+ − ln f−, se = √(4.8/(n h)·(1/f+ + 1/f−))).
    rng = np.random.default_rng(4)
    x = np.round(rng.normal(0, 1, 20000), 2)
    x = np.where((x > 0) & (x < 0.3) & (rng.random(x.size) < 0.3), -x, x)   # sorting to the left
    df = pd.DataFrame({"x": x, "d": (x >= 0).astype(float), "z": 0.0})
    st = stats_of(df)
    b, h = 0.05, 0.6
    got = mccrary_test(st, 0.0, bin_width=b, bandwidth=h)
    j = np.floor(x / b + 1e-7)
    lo, hi = int(j.min()), int(j.max())
    counts = np.array([(j == k).sum() for k in range(lo, hi + 1)], float)
    mids = (np.arange(lo, hi + 1) + 0.5) * b
    heights = counts / (x.size * b)
    est = []
    for side in (mids < 0, mids > 0):
        w = np.clip(1 - np.abs(mids[side]) / h, 0, None)
        X = np.column_stack([np.ones(side.sum()), mids[side]])
        est.append(np.linalg.lstsq(X * np.sqrt(w)[:, None], heights[side] * np.sqrt(w), rcond=None)[0][0])
    fl, fr = est
    assert_allclose([got.f_left, got.f_right], [fl, fr], rtol=1e-9)
    assert_allclose(got.theta, np.log(fr / fl), rtol=1e-9)
    assert_allclose(got.se, np.sqrt(4.8 / (x.size * h) * (1 / fr + 1 / fl)), rtol=1e-12)
    assert got.p_value < 0.01          # the planted sorting is detected
