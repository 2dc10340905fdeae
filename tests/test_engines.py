"""The local engine's streaming pass: batch size, row order and kernel never change the bins."""
import subprocess
import sys
from fractions import Fraction

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from scanner.engines import BinPlan, bin_table, grid
from scanner.errors import InputError
from scanner.io import open_table

from .conftest import ROOT

EXACT_FIELDS = ("key", "period", "half", "n", "cnt", "pn")
SUM_FIELDS = ("sx", "sxx", "s1", "s2", "pa", "pb", "paa", "pbb", "pab")


def assert_same_stats(a, b):
    """Counts and keys equal exactly; sums to 1e-9 (only the order of additions differs)."""
    assert (a.kind, a.n_bins) == (b.kind, b.n_bins)
    assert a.width == b.width or (np.isnan(a.width) and np.isnan(b.width))
    for f in EXACT_FIELDS:
        assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f)
    for f in SUM_FIELDS:
        assert_allclose(getattr(a, f), getattr(b, f), rtol=1e-9, atol=1e-9, err_msg=f)


def small_table(n=300, seed=5):
    """Invented rows: a continuous, a decimal-coded and an integer running variable with gaps."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "cont": rng.normal(40, 12, n),
        "lab": np.round(rng.normal(6.5, 1.1, n), 1),
        "age": rng.integers(18, 90, n).astype(float),
        "d": (rng.random(n) < 0.4).astype(float),
        "y": rng.normal(size=n),
        "z": rng.normal(size=n),
        "visit": pd.to_datetime("2019-01-01") + pd.to_timedelta(rng.integers(0, 900, n), "D"),
    })
    df.loc[::9, "y"] = np.nan
    df.loc[::13, "cont"] = np.nan
    df.loc[3, "cont"] = np.inf
    df.loc[4, "cont"] = 5e6          # an outlier costs one bin
    return df


PLAN = dict(running=("cont", "lab", "age"), columns=("d", "y", "z"), treatments=("d",),
            pairs=(("d", "y"),), max_exact=40, max_bins=30, fine_keys=60)


@pytest.fixture(scope="module")
def parquet_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("eng") / "small.parquet"
    pq.write_table(pa.Table.from_pandas(small_table(), preserve_index=False), path, row_group_size=50)
    return path


@pytest.mark.parametrize("date", [None, "visit"])
def test_batch_size_does_not_change_bins(parquet_file, date):
    ref = bin_table(open_table(parquet_file), BinPlan(**PLAN, date=date, batch_rows=100_000))
    assert ref.stats["cont"].kind == "width" and ref.stats["age"].kind == "width"
    for rows in (1, 7, 64):
        got = bin_table(open_table(parquet_file), BinPlan(**PLAN, date=date, batch_rows=rows))
        assert got.rows_read == ref.rows_read == 300
        assert got.missing == ref.missing and got.nonfinite == ref.nonfinite
        for r in PLAN["running"]:
            assert_same_stats(got.stats[r], ref.stats[r])


def test_csv_batches_match_parquet(parquet_file, tmp_path):
    csv = tmp_path / "small.csv"
    small_table().drop(columns="visit").to_csv(csv, index=False)
    plan = BinPlan(**PLAN, batch_rows=16)
    a = bin_table(open_table(csv), plan)
    b = bin_table(open_table(parquet_file), plan)
    for r in PLAN["running"]:
        assert_same_stats(a.stats[r], b.stats[r])


def test_row_order_and_kernel_do_not_change_bins():
    df = small_table(2000, seed=8)
    ref = bin_table(open_table(df), BinPlan(**PLAN))
    sorted_df = df.sort_values("cont", kind="stable")     # sorted extracts are common
    for frame, kernel in ((sorted_df, "sparse"), (df.sample(frac=1, random_state=3), "bincount")):
        got = bin_table(open_table(frame), BinPlan(**PLAN, batch_rows=97, kernel=kernel))
        for r in PLAN["running"]:
            assert_same_stats(got.stats[r], ref.stats[r])


def test_exact_bins_equal_pandas_groupby():
    # Reference: pandas groupby sums on the raw rows (independent of our binning code).
    df = small_table(3000, seed=2)
    st = bin_table(open_table(df), BinPlan(("age",), ("d", "y"), ("d",), (("d", "y"),),
                                           batch_rows=250)).stats["age"]
    assert st.kind == "exact"
    g = df.groupby("age")
    assert_array_equal(st.key, g.size().index.to_numpy())
    assert_array_equal(st.n, g.size().to_numpy())
    assert_array_equal(st.cnt[:, 1], g["y"].count().to_numpy())
    assert_allclose(st.s1[:, 1], g["y"].sum().to_numpy(), rtol=1e-12)
    assert_allclose(st.s2[:, 1], g["y"].apply(lambda v: (v ** 2).sum()).to_numpy(), rtol=1e-12)
    both = df.dropna(subset=["d", "y"]).assign(dy=lambda f: f.d * f.y).groupby("age")
    assert_allclose(st.pab[:, 0], both["dy"].sum().reindex(st.key, fill_value=0).to_numpy(),
                    rtol=1e-12, atol=1e-12)


def test_grid_keys_equal_exact_rational_floor():
    # Reference: exact rational arithmetic (Python's fractions) on the decimal edges k·p/10^d.
    rng = np.random.default_rng(1)
    x = np.concatenate([[round(v, int(k)) for v, k in zip(rng.normal(0, 50, 400), rng.integers(0, 4, 400))],
                        [0.3, 0.7, 6.5, -0.3, 2.9, 1e-3, 30.0]])
    for p, d in ((1.0, 1), (5.0, 2), (2.0, 0), (1.0, -1), (25.0, 1)):
        got = grid.keys(x, p, d)
        for xi, k in zip(x, got):
            exact = Fraction(repr(float(xi))) * 10 ** d / int(p) if d >= 0 else \
                Fraction(repr(float(xi))) / (int(p) * 10 ** (-d))
            assert k == exact.__floor__(), (xi, p, d)


def test_cutoff_value_opens_its_bin():
    # 0.3/0.1 is 2.9999999999999996 in doubles; a row recorded at 0.3 belongs to the bin [0.3, 0.4).
    assert grid.keys(np.array([0.3, 0.29999]), 1.0, 1).tolist() == [3, 2]


def test_width_grid_is_finest_series_width_within_max_bins():
    rng = np.random.default_rng(4)
    x = rng.uniform(0, 10, 30_000)
    st = bin_table(open_table(pd.DataFrame({"x": x, "d": 0.0})),
                   BinPlan(("x",), ("d",), ("d",), batch_rows=3333)).stats["x"]
    # Reference: the definition itself, evaluated by brute force on the raw values.
    assert st.kind == "width" and st.width == 0.002
    assert st.n_bins == np.unique(np.floor(x / 0.002)).size <= 5000
    assert np.unique(np.floor(x / 0.001)).size > 5000


def test_user_bin_width_is_kept():
    df = small_table(500)
    st = bin_table(open_table(df), BinPlan(("cont",), ("d",), bin_width={"cont": 2.5})).stats["cont"]
    assert st.kind == "width" and st.width == 2.5
    assert_array_equal(st.key, np.unique(np.floor(df.cont[np.isfinite(df.cont)] / 2.5)))


def test_unknown_engine_is_an_input_error():
    with pytest.raises(InputError, match="'spork' is not an engine; use 'local' or 'spark'"):
        bin_table(open_table(small_table(20)), BinPlan(("age",), ("d",)), engine="spork")


def test_pass_reads_into_jemalloc_and_restores_the_pool(parquet_file, monkeypatch):
    # The pass decodes its batches into arrow's jemalloc pool (mimalloc's returned pages cost
    # more kernel time than the folding), and only while it runs; a pool the user chose
    # through ARROW_DEFAULT_MEMORY_POOL is kept.
    try:
        pa.jemalloc_memory_pool()
    except NotImplementedError:
        pytest.skip("this pyarrow build has no jemalloc")
    before = pa.default_memory_pool()
    seen = []
    plan = BinPlan(**PLAN, batch_rows=100)
    monkeypatch.delenv("ARROW_DEFAULT_MEMORY_POOL", raising=False)
    bin_table(open_table(parquet_file), plan,
              progress=lambda m: seen.append(pa.default_memory_pool().backend_name))
    assert seen == ["jemalloc"] * 3
    assert pa.default_memory_pool().backend_name == before.backend_name
    seen.clear()
    monkeypatch.setenv("ARROW_DEFAULT_MEMORY_POOL", "system")
    bin_table(open_table(parquet_file), plan,
              progress=lambda m: seen.append(pa.default_memory_pool().backend_name))
    assert seen == [before.backend_name] * 3


def test_pandas_scan_never_imports_pyspark():
    code = ("import sys, numpy as np, pandas as pd, scanner\n"
            "rng = np.random.default_rng(0); x = rng.integers(-30, 31, 3000).astype(float)\n"
            "df = pd.DataFrame({'x': x, 'd': (rng.random(3000) < 0.2 + 0.5 * (x >= 0)).astype(float)})\n"
            "spec = {'running': [{'column': 'x'}], 'treatments': {'columns': ['d']}}\n"
            "res = scanner.scan(spec, df)\n"
            "assert len(res.rows) > 0\n"
            "print('pyspark' in sys.modules, any(m.startswith('py4j') for m in sys.modules))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                         env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"}, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "False"]


def test_scan_results_do_not_depend_on_batch_rows(tmp_path):
    df = small_table(600, seed=9)
    df["d"] = (np.random.default_rng(1).random(600) < 0.2 + 0.6 * (df.age >= 50)).astype(float)
    path = tmp_path / "t.parquet"
    df.to_parquet(path)
    import scanner
    spec = {"data": {"source": str(path)}, "running": [{"column": "age"}, {"column": "cont"}],
            "treatments": {"columns": ["d"]}, "covariates": {"columns": ["z"]}}
    results = []
    for rows in (1, 50, 1_000_000):
        spec["data"]["batch_rows"] = rows
        results.append(scanner.scan(spec).rows)
    for other in results[1:]:
        assert len(other) == len(results[0])
        for a, b in zip(results[0], other):
            for k, v in a.items():
                if isinstance(v, float):
                    assert_allclose(b[k], v, rtol=1e-9, atol=1e-12, err_msg=k)
                elif not isinstance(v, (list, dict)):
                    assert b[k] == v, k


def test_candidate_rows_do_not_depend_on_worker_processes(tmp_path, monkeypatch):
    # The candidate loop shares running variables among forked processes; every row must be
    # the same as with one process (same floats, same order).
    import json
    import sys
    from pathlib import Path
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
    import bench_data as bd
    import scanner
    from scanner.scan import split_by_running
    folder = bd.generate(tmp_path / "t", 30000, 4, 2, 2, dated=True)
    spec = bd.spec_for(folder, 4, 2, 2, dated=True)
    got = {}
    for w in ("1", "2"):
        monkeypatch.setenv("CUTSCAN_WORKERS", w)
        res = scanner.scan(spec)
        got[w] = json.dumps(res.to_dict()["candidates"], sort_keys=True, default=str)
    assert len(json.loads(got["1"])) >= 40
    assert got["1"] == got["2"]
    # the split keeps running variables whole and balances the counts
    from scanner.candidates import Candidate
    cands = [Candidate(f"r{i % 3}", "t", float(i), "round") for i in range(10)]
    groups = split_by_running(cands, 2)
    assert sorted(sum(groups, [])) == list(range(10))
    assert all(len({cands[i].running for i in g}) >= 1 for g in groups)
    assert not ({cands[i].running for i in groups[0]} & {cands[i].running for i in groups[1]})


def test_period_detail_only_where_asked():
    # Year keys are the quarter keys summed by year; "none" is the pooled bins; the date is read
    # only when some running variable keeps periods.  Reference: the quarter-keyed bins summed
    # with numpy (same rows).
    df = small_table(2000, seed=3)
    base = dict(PLAN, running=("lab", "age"), date="visit", split_seed=5)
    q = bin_table(open_table(df), BinPlan(**base)).stats
    y = bin_table(open_table(df), BinPlan(**base, periods={"lab": "year", "age": "none"})).stats
    assert (y["lab"].period[y["lab"].period >= 0] % 4 == 0).all()
    assert (y["age"].period == -1).all() and (y["age"].half >= 0).any()
    for r in ("lab", "age"):
        ref = q[r].collapse(period=True, half=False)
        got = y[r].collapse(period=True, half=False)
        assert_same_stats(got, ref)
    yr = q["lab"]
    for year in np.unique(yr.period[yr.period >= 0] // 4):
        a = yr.restrict(period=np.arange(4 * year, 4 * year + 4)).collapse()
        b = y["lab"].restrict(period=4 * year).collapse()
        assert_same_stats(b, a)
    none = BinPlan(**base, periods={"lab": "none", "age": "none"})
    assert "visit" not in none.needed and "visit" in BinPlan(**base).needed


def irregular_table(n=4000, seed=11):
    """Invented rows shaped like real extracts: a skewed score, a half-integer lattice with a
    999 missing code, uptake exactly 0 below one cutoff, ±inf and gaps, visit dates."""
    rng = np.random.default_rng(seed)
    skew = rng.lognormal(2.0, 0.9, n)
    half = np.round(rng.normal(20, 4, n) * 2) / 2
    half[rng.random(n) < 0.03] = 999.0
    d = np.where(half >= 21.5, (rng.random(n) < 0.7), 0.0).astype(float)
    df = pd.DataFrame({"skew": skew, "half": half, "five": rng.choice([0, 5, 10, 15, 20], n) * 1.0,
                       "d": d, "y": rng.normal(size=n), "z": rng.exponential(size=n),
                       "visit": pd.to_datetime("2016-03-01")
                       + pd.to_timedelta(rng.integers(0, 2500, n), "D")})
    df.loc[::17, "y"] = np.nan
    df.loc[5, "z"] = np.inf
    df.loc[::23, "skew"] = np.nan
    df.loc[7, "skew"] = -np.inf
    return df


IRR = dict(running=("skew", "half", "five"), columns=("d", "y", "z"), treatments=("d",),
           pairs=(("d", "y"), ("z", "y")), max_exact=50, max_bins=40, fine_keys=80,
           edges={"skew": ((7.25, True),)})


@pytest.mark.parametrize("keys", [{}, dict(date="visit", split_seed=3),
                                  dict(date="visit", split_seed=3,
                                       periods={"skew": "year", "half": "none"}),
                                  # rows move to year order; "five" has no keys at all
                                  dict(date="visit",
                                       periods={"skew": "year", "half": "year", "five": "none"})])
def test_compiled_kernel_equals_numpy_kernels(keys, monkeypatch):
    # Reference: the plain numpy bincount kernel (one np.bincount per sum).  The compiled pass
    # reorders each batch's rows by period and half and folds variables in two threads; counts
    # and keys must be equal, sums to 1e-9 (only the order of additions differs).
    df = irregular_table()
    ref = bin_table(open_table(df), BinPlan(**IRR, **keys, batch_rows=700, kernel="bincount"))
    for workers in ("1", "2"):
        monkeypatch.setenv("CUTSCAN_WORKERS", workers)
        got = bin_table(open_table(df), BinPlan(**IRR, **keys, batch_rows=700, kernel="compiled"))
        assert got.missing == ref.missing and got.nonfinite == ref.nonfinite
        for r in IRR["running"]:
            assert_same_stats(got.stats[r], ref.stats[r])
    assert ref.stats["skew"].kind == "width" and ref.stats["half"].kind == "width"


def test_compiled_kernel_known_sums_per_batch(monkeypatch):
    # The compiled pass skips sums it knows (y² = y of a 0/1 column; the count of a column with
    # no missing value in the batch; a complete pair's joint count and sums): batches where
    # the columns are complete and batches where they are not must give the numpy kernel's bins.
    rng = np.random.default_rng(21)
    n = 2400
    df = pd.DataFrame({"x": rng.integers(0, 60, n) * 0.5, "d": (rng.random(n) < 0.4) * 1.0,
                       "flag": (rng.random(n) < 0.3) * 1.0, "y": rng.normal(size=n)})
    df.loc[1300::7, "flag"] = np.nan        # a 0/1 covariate missing only in later batches
    df.loc[1900::5, "y"] = np.nan
    df.loc[2100:2140, "d"] = np.nan
    plan = dict(running=("x",), columns=("d", "flag", "y"), treatments=("d",),
                pairs=(("d", "y"), ("flag", "y"), ("d", "flag")))
    ref = bin_table(open_table(df), BinPlan(**plan, batch_rows=500, kernel="bincount"))
    from scanner.engines import local, resources
    real = local.in_blocks
    for workers, budget in (("1", resources.ADDEND_BUDGET), ("2", 28 * 150)):
        # a small budget (28 bytes per row: 3 columns and 1 running variable): batches are
        # folded in blocks.  (With one running variable there is no thread pool; two threads
        # are tested in test_compiled_kernel_equals_numpy_kernels.)
        monkeypatch.setenv("CUTSCAN_WORKERS", workers)
        monkeypatch.setattr(resources, "ADDEND_BUDGET", budget)
        monkeypatch.setattr(resources, "MIN_BLOCK", 97)
        blocks = []

        def counted(batches, rows):
            for b in real(batches, rows):
                blocks.append(b.num_rows)
                yield b
        monkeypatch.setattr(local, "in_blocks", counted)
        got = bin_table(open_table(df), BinPlan(**plan, batch_rows=500, kernel="compiled"))
        assert_same_stats(got.stats["x"], ref.stats["x"])
        assert sum(blocks) == n
        if workers == "2":                                     # the small budget
            assert max(blocks) < 500                           # the batches were split
    # and against pandas on the raw rows: Σflag² over finite rows, joint count of (flag, y)
    g = df.groupby("x")
    st = got.stats["x"]
    assert_allclose(st.s2[:, 1], g.flag.apply(lambda v: (v.dropna() ** 2).sum()).to_numpy())
    both = df.flag.notna() & df.y.notna()
    assert_array_equal(st.pn[:, 1], both.groupby(df.x).sum().to_numpy())


def test_local_groups_numbered_by_period_half_then_bin():
    # Batch-local groups are numbered period-half by period-half, bins in order within each:
    # the totals give the first batch its slots in that order, so later batches are added
    # walking forwards.  Each row's group is its (bin, period-half) cell; dropped rows get -1.
    from scanner.engines import compiled
    rng = np.random.default_rng(4)
    nb, span, m = 7, 5, 400
    g = rng.integers(0, nb + 1, m).astype(np.int32)          # nb: no finite running value
    ext = rng.integers(0, span, m).astype(np.int64)
    lut = np.full(nb * span, -1, np.int32)
    out, first = compiled.local_groups(g, nb, ext, span, np.empty(m, np.int32), lut,
                                       np.empty(nb * span, np.int64))
    live = g < nb
    cells = g[live].astype(np.int64) * span + ext[live]
    want = np.array(sorted(set(cells.tolist()), key=lambda c: (c % span, c // span)))
    assert_array_equal(first, want)
    assert_array_equal(first[out[live]], cells)
    assert (out[~live] == -1).all()
    assert (lut == -1).all()                                  # left ready for the next batch


@pytest.mark.parametrize("kernel", ["compiled", "bincount"])
@pytest.mark.parametrize("bad", [2.0, np.inf, -1.0, 0.5])
def test_treatment_not_zero_one_is_refused_by_every_kernel(kernel, bad):
    # The compiled pass checks treatments in one compiled loop; it must refuse what numpy's
    # check refuses (anything but 0, 1 and missing, infinities included) with the same message.
    df = pd.DataFrame({"x": np.arange(50.0), "d": np.r_[np.zeros(30), np.ones(19), bad]})
    df.loc[3, "d"] = np.nan                                   # missing is allowed
    plan = BinPlan(running=("x",), columns=("d",), treatments=("d",), kernel=kernel)
    with pytest.raises(InputError, match="treatment column 'd' must be 0/1.*values seen: ") as e:
        bin_table(open_table(df), plan)
    assert f"{bad:g}" in str(e.value).split("values seen: ")[1]
    df.loc[49, "d"] = 1.0
    assert bin_table(open_table(df), plan).rows_read == 50


@pytest.mark.parametrize("kernel", ["compiled", "bincount"])
def test_many_cutoffs_inside_one_bin(kernel):
    # Part j of a bin split at cutoffs has key k + j/SUB: with SUB or more cutoffs inside one
    # bin it would reach the next bin's keys and mix rows of two bins silently.  Up to the
    # limit every row is in the bin its bounds say; beyond it the pass refuses, saying why.
    rng = np.random.default_rng(1)
    x = rng.uniform(0, 1, 20_000)
    x[:40] = 0.5 + rng.uniform(0, 2e-4, 40)              # rows among and above the cutoffs
    df = pd.DataFrame({"x": x, "d": (x > 0.5) * 1.0})

    def plan(count):
        return BinPlan(running=("x",), columns=("d",), treatments=("d",), kernel=kernel,
                       edges={"x": tuple((0.5 + i * 1e-7, True) for i in range(count))})
    st = bin_table(open_table(df), plan(300)).stats["x"]
    lo, hi = st.bounds()
    inside = (x[None, :] >= lo[:, None]) & (x[None, :] < hi[:, None])
    assert_array_equal(st.n, inside.sum(axis=1))
    assert_allclose(st.sx, (inside * x).sum(axis=1), rtol=1e-12)
    cuts = np.array([0.5 + i * 1e-7 for i in range(300)])
    for b in np.flatnonzero((hi > 0.5) & (lo < 0.5003)):    # no bin holds rows from both sides
        side = np.searchsorted(cuts, x[inside[b]], "right")  # of a cutoff (x >= c: above it)
        assert side.min() == side.max()
    with pytest.raises(InputError, match=r"cutoffs .* fall inside one bin .* at most 1,023 can"
                                          r".* on running variable 'x'"):
        bin_table(open_table(df), plan(1100))


def test_compiled_kernel_without_dense_table(monkeypatch):
    # Too many (bin, period, half) combinations for the dense table: hashed instead, same bins.
    from scanner.engines import accumulate
    df = irregular_table(1500, seed=4)
    plan = BinPlan(**IRR, date="visit", split_seed=3, batch_rows=400)
    ref = bin_table(open_table(df), BinPlan(**{**plan.__dict__, "kernel": "bincount"}))
    monkeypatch.setattr(accumulate, "LUT_MAX", 8)
    got = bin_table(open_table(df), plan)
    for r in IRR["running"]:
        assert_same_stats(got.stats[r], ref.stats[r])


@pytest.mark.parametrize("cells", [8, 5000])
def test_slot_table_left_for_hashed_codes(monkeypatch, cells):
    # The totals find each (bin, period, half) slot in a dense table while it is small, and by
    # hashing once it would grow past TABLE_CELLS: from the first batch (8 cells) or part way
    # through the pass (5,000 cells, reached after some batches) — the same bins either way.
    from scanner.engines import sums
    df = irregular_table(1500, seed=4)
    plan = BinPlan(**IRR, date="visit", split_seed=3, batch_rows=400)
    ref = bin_table(open_table(df), BinPlan(**{**plan.__dict__, "kernel": "bincount"}))
    left = []
    real = sums.SlotSums._table

    def watched(self):
        table = self._codes is None
        t = real(self)
        if table and self._codes is not None:         # the moment it leaves the table
            left.append(self.size)
        return t
    monkeypatch.setattr(sums, "TABLE_CELLS", cells)
    monkeypatch.setattr(sums.SlotSums, "_table", watched)
    got = bin_table(open_table(df), plan)
    for r in IRR["running"]:
        assert_same_stats(got.stats[r], ref.stats[r])
    assert left                                         # the hashed look-up was used
    if cells == 5000:
        assert min(left) > 0                            # ... after slots were in the table
    else:
        assert max(left) == 0                           # ... from the first batch


def test_compiled_keyed_bins_equal_pandas_groupby():
    # Reference: pandas groupby sums over (value, calendar quarter) on the raw rows.
    df = irregular_table(3000, seed=6)
    st = bin_table(open_table(df), BinPlan(("five",), ("d", "y"), ("d",), date="visit",
                                           batch_rows=333)).stats["five"]
    q = df.visit.dt.year * 4 + df.visit.dt.quarter - 1
    g = df.assign(q=q).groupby(["five", "q"])
    assert_array_equal(st.key, g.size().index.get_level_values(0).to_numpy())
    assert_array_equal(st.period, g.size().index.get_level_values(1).to_numpy())
    assert_array_equal(st.n, g.size().to_numpy())
    assert_array_equal(st.cnt[:, 1], g["y"].count().to_numpy())
    assert_allclose(st.s1[:, 1], g["y"].sum().to_numpy(), rtol=1e-12, atol=1e-12)
    assert_allclose(st.s2[:, 0], g["d"].sum().to_numpy(), rtol=1e-12)


def test_text_columns_keep_file_order(tmp_path):
    # Text cells are parsed in file order (messages quote the first bad values), so a batch
    # with text columns is not reordered; the bins are the same either way.
    df = irregular_table(800, seed=9)
    csv = tmp_path / "t.csv"
    df.assign(y=df.y.map(lambda v: "" if np.isnan(v) else f"{v:.6f}")).to_csv(csv, index=False)
    plan = BinPlan(**IRR, date="visit", split_seed=3, batch_rows=300)
    a = bin_table(open_table(csv, text_columns=("y",)), plan)
    b = bin_table(open_table(csv, text_columns=("y",)), BinPlan(**{**plan.__dict__, "kernel": "bincount"}))
    for r in IRR["running"]:
        assert_same_stats(a.stats[r], b.stats[r])


def test_parquet_folder_with_mixed_column_types(tmp_path):
    # A folder whose files store a column with different types (int16 in one, float64 in the
    # other, as appended extracts do) reads as the folder's types; reference: the same rows
    # from one pandas frame.
    df = irregular_table(900, seed=12).drop(columns="visit")
    df["five"] = df["five"].astype("int16")
    folder = tmp_path / "mixed"
    folder.mkdir()
    pq.write_table(pa.Table.from_pandas(df.iloc[:400], preserve_index=False), folder / "a.parquet",
                   row_group_size=150)
    pq.write_table(pa.Table.from_pandas(df.iloc[400:].astype({"five": float}), preserve_index=False),
                   folder / "b.parquet", row_group_size=150)
    plan = BinPlan(**IRR, batch_rows=200)
    got = bin_table(open_table(folder), plan)
    ref = bin_table(open_table(df), plan)
    assert got.rows_read == 900
    for r in IRR["running"]:
        assert_same_stats(got.stats[r], ref.stats[r])


def test_parquet_folder_with_fractions_after_an_integer_file(tmp_path):
    # The second file holds 0.5 where the first stored int16: the folder's type was the first
    # file's, and reading failed with a message naming neither the file nor the column.  The
    # types are unified over the files (int16 and double read as double); a column that cannot
    # be converted (text in one file) is an input error naming the file and the column.
    folder = tmp_path / "mixed"
    folder.mkdir()
    a = pd.DataFrame({"x": np.arange(-20, 20, dtype="int16"), "d": np.tile([0.0, 1.0], 20)})
    b = pd.DataFrame({"x": np.arange(-20, 20) + 0.5, "d": np.tile([1.0, 0.0], 20)})
    pq.write_table(pa.Table.from_pandas(a, preserve_index=False), folder / "a.parquet")
    pq.write_table(pa.Table.from_pandas(b, preserve_index=False), folder / "b.parquet")
    plan = BinPlan(("x",), ("d",), ("d",))
    got = bin_table(open_table(folder), plan).stats["x"]
    ref = bin_table(open_table(pd.concat([a.astype({"x": float}), b])), plan).stats["x"]
    assert_same_stats(got, ref)
    pq.write_table(pa.Table.from_pandas(b.astype({"x": str}), preserve_index=False),
                   folder / "c.parquet")
    with pytest.raises(InputError, match=r"c\.parquet: column\(s\) x have a different type"):
        bin_table(open_table(folder), plan)


def test_junk_magnitudes_keep_their_side_and_do_not_crash():
    # One value of ±1e300 in a gridded variable: floor(x / w) overflowed int64 — the compiled
    # kernel stopped with an internal error, the numpy kernels put +1e300 at −9.2e18, below
    # every cutoff.  Keys are clipped to ±2^60: the row keeps its side, both kernels agree.
    rng = np.random.default_rng(1)
    x = np.r_[rng.lognormal(0, 2, 5000), 1e300, -1e300]
    df = pd.DataFrame({"x": x, "d": (rng.random(x.size) < 0.3).astype(float)})
    plan = dict(running=("x",), columns=("d",), treatments=("d",), fine_keys=500, max_bins=200,
                edges={"x": ((1.0, True),)})
    with np.errstate(over="ignore"):
        ref = bin_table(open_table(df), BinPlan(**plan, kernel="bincount")).stats["x"]
        got = bin_table(open_table(df), BinPlan(**plan)).stats["x"]
    assert ref.kind == "width"
    assert_array_equal(got.key, ref.key)
    assert_array_equal(got.n, ref.n)
    assert got.key[0] < -1e17 and got.key[-1] > 1e17       # each on its own side of 1.0
    assert got.n[0] == 1 and got.n[-1] == 1


def test_declaring_a_cutoff_does_not_coarsen_the_grid():
    # 300 values over 100 bins of 0.1 with fine_keys = 100: a declared cutoff at 5.05 splits one
    # bin in two.  The pass counted the parts and coarsened to 1.0 (Spark, counting whole bins,
    # kept 0.1): the width must not depend on whether a cutoff was declared.
    x = np.round(np.linspace(0.0, 9.99, 300), 3)
    df = pd.DataFrame({"x": x, "d": (np.arange(x.size) % 3 == 0).astype(float)})
    plan = dict(running=("x",), columns=("d",), treatments=("d",), fine_keys=100, max_exact=50,
                max_bins=150)
    plain = bin_table(open_table(df), BinPlan(**plan)).stats["x"]
    cut = bin_table(open_table(df), BinPlan(**plan, edges={"x": ((5.05, True),)})).stats["x"]
    assert plain.kind == cut.kind == "width"
    assert cut.width == plain.width
    assert not cut.straddles(5.05)


@pytest.mark.parametrize("p,d", [(1.0, 0), (1.0, 1), (2.0, 2), (5.0, 3), (1.0, -1), (5.0, -2),
                                 (0.3, 0)])
def test_compiled_grid_keys_equal_numpy_keys(p, d):
    # The compiled pass keys rows in one loop; the numpy grid.keys is the reference.  Values on
    # and next to decimal edges (0.1·3 is not 0.3 in binary), junk magnitudes and non-finite.
    from scanner.engines import compiled, grid
    rng = np.random.default_rng(5)
    edges_ = grid.edges(np.arange(-300, 300, dtype=float), p, d)
    x = np.r_[rng.normal(0, 40, 20000), np.round(rng.normal(0, 40, 5000), 1), edges_,
              np.nextafter(edges_, -np.inf), np.nextafter(edges_, np.inf), 0.1 * 3, 0.7, 6.5,
              1e300, -1e300, 1e-300, -0.0, np.nan, np.inf, -np.inf]
    ok = np.isfinite(x)
    with np.errstate(over="ignore", invalid="ignore"):
        ref = np.where(ok, grid.keys(np.where(ok, x, 0.0), p, d), 0)
    assert_array_equal(grid.keys_compiled(x, ok, p, d), ref)
    # into a reused buffer holding the last batch's keys: rows with no finite value get 0 too
    dirty = np.full(x.size, 77, np.int64)
    assert_array_equal(grid.keys_compiled(x, ok, p, d, out=dirty), ref)
    got_ok, nan, inf = compiled.finite_counts(x)
    assert_array_equal(got_ok, ok)
    assert (nan, inf) == (1, 2)


@pytest.mark.parametrize("hint", [0, 3])
def test_compiled_decimal_codes_equal_numpy_codes(hint):
    # Reference: the numpy grouping (codes._codes).  Whole numbers, half and 3-decimal
    # lattices, 0.1 + 0.2 (not a short decimal), the 2^52 edge, -0.0, a value that is not a
    # short decimal after the first 64 rows, integers too spread for a dense table at 3
    # decimals (a hint of 3 must not hide their dense table at 0), NaN and inf, and negative
    # decimals only (the bounds, kept as whole numbers, start far outside on both sides).
    from scanner.engines.codes import _codes, _codes_compiled
    rng = np.random.default_rng(8)
    cases = [rng.integers(0, 100, 500).astype(float), rng.integers(0, 60, 500) * 0.5,
             np.round(rng.normal(5, 1, 500), 3), np.r_[np.full(100, 0.1), 0.1 + 0.2],
             np.r_[rng.integers(0, 9, 100).astype(float), 2.0 ** 52, -0.0],
             np.r_[rng.integers(0, 9, 100).astype(float), 1 / 3],
             rng.integers(0, 10_000, 2_000).astype(float),
             np.r_[rng.integers(0, 50, 300).astype(float), np.nan, np.inf, -np.inf],
             np.r_[np.nan, rng.integers(-400, -100, 300) * 0.1]]         # negative bounds only
    for x in cases:
        ok = np.isfinite(x)
        (g, keys, nb), _ = _codes_compiled(x, ok, False, hint)
        rg, rkeys, rnb = _codes(x, ok, False)
        assert nb == rnb
        assert_array_equal(np.sort(keys), np.sort(rkeys))
        assert_array_equal(np.asarray(keys)[g[ok]], x[ok])      # every row keyed to its value
        assert (g[~ok] == nb).all()


@pytest.mark.parametrize("keys", [{}, dict(date="visit", split_seed=3)])
def test_narrow_column_types_read_in_place(keys, monkeypatch):
    # The compiled pass converts integers of up to 32 bits and floats with no missing value as
    # it copies them (and moves them to their period order); a nullable column goes through
    # the general conversion.  Both must give the numpy kernel's bins, and the narrow columns
    # must not reach the general conversion.
    import pyarrow as pa
    df = irregular_table(1800, seed=9)
    rng = np.random.default_rng(9)
    n = len(df)
    cols = {"skew": pa.array(df["skew"].to_numpy(np.float32)),                  # float32 running
            "half": pa.array(np.where(df.half < 999, df.half * 2, 0).astype(np.int16)),
            "five": pa.array(df.five.to_numpy().astype(np.uint8)),
            "d": pa.array(df.d.to_numpy().astype(np.int8)),                  # int8 treatment
            "y": pa.array(df.y.to_numpy(np.float32)),                          # float32 with NaN
            "z": pa.array(np.where(rng.random(n) < 0.1, None, rng.integers(0, 9, n)),
                          pa.int32()),                                         # int32 with nulls
            "visit": pa.array(df.visit)}
    table = pa.table(cols)
    plan = dict(IRR, **keys)
    ref = bin_table(open_table(table), BinPlan(**plan, batch_rows=700, kernel="bincount"))
    from scanner.engines import batchfold
    general = []
    real = batchfold.numeric

    def counted(batch, name, *a, **k):
        general.append(name)
        return real(batch, name, *a, **k)
    monkeypatch.setattr(batchfold, "numeric", counted)
    got = bin_table(open_table(table), BinPlan(**plan, batch_rows=700, kernel="compiled"))
    assert set(general) == {"z"}                       # only the nullable column
    for r in IRR["running"]:
        assert_same_stats(got.stats[r], ref.stats[r])
    # and the counts against the raw rows: the int32 column's nulls are missing values
    st = got.stats["five"]
    z_present = pd.Series(cols["z"].is_valid().to_numpy(zero_copy_only=False))
    assert int(st.cnt[:, 2].sum()) == int(z_present.sum()) < n


def test_compiled_quarters_equal_pyarrow_year_and_quarter(monkeypatch):
    # Reference: pyarrow's year() and quarter() functions (scanner.io.period_codes).  Dates
    # from 1700 to 2300 — before 1970, across leap days and century years — as date32, date64
    # and time stamps in every unit with times of day, all through the compiled loop (the
    # reference is made unreachable for them); a time zone and nulls must take pyarrow's route
    # (the compiled loop is made unreachable for them).
    import pyarrow as pa
    import scanner.io
    from scanner.engines.batchfold import quarters
    from scanner.io import period_codes
    rng = np.random.default_rng(12)
    days = np.r_[rng.integers(-100_000, 120_000, 20_000), np.arange(-800, 800),
                 [-25_567, -25_568, 10_956, 10_957, 11_016, 11_017, 47_541]].astype(np.int64)
    arrays = [pa.array(days.astype(np.int32), pa.date32()),       # too spread for a table
              pa.array(rng.integers(-400, 4_000, 3_000).astype(np.int32), pa.date32()),  # table
              pa.array(days * 86_400_000, pa.date64())]
    for unit, per in (("s", 1), ("ms", 1_000), ("us", 10 ** 6), ("ns", 10 ** 9)):
        keep = np.abs(days) < 100_000 if unit == "ns" else slice(None)
        stamps = days[keep] * 86_400 * per + rng.integers(0, 86_400 * per, days[keep].size)
        arrays.append(pa.array(stamps, pa.timestamp(unit)))
    # west of UTC, local quarters differ from UTC ones near midnight at a quarter's start
    arrays.append(pa.array(days * 86_400, pa.timestamp("s", tz="America/New_York")))
    arrays.append(pa.array(np.where(days % 7 == 0, None, days).tolist(), pa.date32()))
    from scanner.engines import compiled
    for i, arr in enumerate(arrays):
        batch = pa.RecordBatch.from_arrays([arr], ["visit"])
        ref = period_codes(batch, "visit", "t")
        if i < 7:
            monkeypatch.setattr(scanner.io, "period_codes", None)      # the compiled loop only
        else:
            monkeypatch.setattr(compiled, "quarter_codes", None)       # pyarrow's route only
        assert_array_equal(quarters(batch, "visit", "t"), ref, err_msg=str(arr.type))
        monkeypatch.undo()


def test_compiled_period_and_half_keys_equal_numpy():
    # Reference: the numpy keys (local.half_split, local.keyed through local._extra).  Row
    # halves from several starts and seeds; period-half codes with quarters, whole years or no
    # period, with and without halves, with missing dates and a batch with no date at all.
    from scanner.engines import compiled, local
    rng = np.random.default_rng(3)
    for m in (1, 7, 1000):
        q = rng.integers(7900, 8100, m).astype(np.int32)
        q[rng.random(m) < 0.2] = -1
        h = rng.integers(0, 2, m).astype(np.int8)
        for start, seed in ((0, 1), (10 ** 9, 20240601), (5, 0)):
            assert_array_equal(compiled.row_halves(start, m, seed),
                               local.half_split(np.arange(start, start + m), seed))
        for detail in ("none", "quarter", "year"):
            for halves in (None, h):
                for quarter in (None, q, np.full(m, -1, np.int32)):
                    ref = local._extra(detail, quarter, halves, m)
                    got = local._extra(detail, quarter, halves, m, True)
                    if ref is None:
                        assert got is None
                        continue
                    assert_array_equal(got[0], ref[0])
                    assert got[1:] == ref[1:]



def test_compiled_pass_long_batches_late_values_and_old_dates():
    # Batches of 20,000 rows (each half folded in several blocks of rows), a running variable
    # with no finite value in its first batch (its groups are skipped while the others fold),
    # and visit dates before 1970 or missing: the numpy kernel's bins.
    rng = np.random.default_rng(17)
    n = 50_000
    late = np.round(rng.normal(40, 8, n), 1)
    late[:20_000] = np.nan
    visit = pd.to_datetime("1965-06-30") + pd.to_timedelta(rng.integers(0, 9000, n), "D")
    df = pd.DataFrame({"a": rng.integers(0, 90, n) * 1.0, "late": late,
                       "d": (rng.random(n) < 0.3) * 1.0, "y": rng.normal(size=n),
                       "visit": visit})
    df.loc[rng.random(n) < 0.02, "visit"] = pd.NaT
    plan = dict(running=("a", "late"), columns=("d", "y"), treatments=("d",),
                pairs=(("d", "y"),), date="visit", split_seed=5, batch_rows=20_000)
    ref = bin_table(open_table(df), BinPlan(**plan, kernel="bincount"))
    got = bin_table(open_table(df), BinPlan(**plan, kernel="compiled"))
    for r in ("a", "late"):
        assert_same_stats(got.stats[r], ref.stats[r])
    assert (ref.stats["a"].period[ref.stats["a"].period >= 0] < 1970 * 4).any()


def test_tied_period_details_give_the_same_sums_under_any_hash_seed():
    # Rows are folded in the order of the period detail most running variables keep; with a
    # tie the first in plan order must win, not the order of a set (which follows the hash
    # seed): the sums would then differ in their last bits between runs.
    code = ("import hashlib, numpy as np\n"
            "from tests.test_engines import irregular_table, IRR\n"
            "from scanner.engines import BinPlan, bin_table\n"
            "from scanner.io import open_table\n"
            "plan = BinPlan(**dict(IRR, date='visit', split_seed=3, batch_rows=400,\n"
            "    periods={'skew': 'year', 'half': 'quarter', 'five': 'none'}))\n"
            "res = bin_table(open_table(irregular_table(3000, seed=2)), plan)\n"
            "h = hashlib.sha256()\n"
            "for r in IRR['running']:\n"
            "    for f in ('sx', 'sxx', 's1', 's2', 'pa', 'pb', 'paa', 'pbb', 'pab'):\n"
            "        h.update(np.ascontiguousarray(getattr(res.stats[r], f)).tobytes())\n"
            "print(h.hexdigest())\n")
    out = []
    for seed in ("1", "4", "7"):       # seeds under which a set of the three puts each first
        env = dict(__import__("os").environ, PYTHONHASHSEED=seed, PYTHONPATH=str(ROOT))
        run = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env,
                             capture_output=True, text=True)
        assert run.returncode == 0, run.stderr[-2000:]
        out.append(run.stdout.strip())
    assert len(set(out)) == 1



@pytest.mark.parametrize("kernel", ["compiled", "bincount"])
def test_batch_with_too_many_grid_bins_is_folded_at_the_coarser_level(monkeypatch, kernel):
    # A skewed lab value: the first batch's head certifies a grid level on which the whole
    # batch still holds more than fine_keys bins.  The grid is coarsened before that batch is
    # folded (as it would be right after), so no batch is folded into more than fine_keys
    # grid bins, and the settled bins equal those of a pass that folds one row at a time on
    # the numpy kernel (the same rule, after each batch).
    from scanner.engines import local
    rng = np.random.default_rng(8)
    n = 30_000
    x = np.r_[np.round(rng.lognormal(1.6, 0.3, 1000), 2), rng.lognormal(1.6, 1.5, n - 1000)]
    df = pd.DataFrame({"x": x, "d": (rng.random(n) < 0.4) * 1.0, "y": rng.normal(size=n)})
    plan = dict(running=("x",), columns=("d", "y"), treatments=("d",), fine_keys=200,
                max_bins=100, max_exact=50)
    seen = []
    real = local.Accumulator.codes

    def codes(self, xv, ok):
        out = real(self, xv, ok)
        seen.append((self.state, np.unique(np.floor(np.asarray(out[1]))).size))
        return out
    monkeypatch.setattr(local.Accumulator, "codes", codes)
    got = bin_table(open_table(df), BinPlan(**plan, batch_rows=10_000, kernel=kernel))
    assert any(s == "fine" for s, _ in seen)
    assert all(nb <= 200 for s, nb in seen if s == "fine"), seen
    monkeypatch.setattr(local.Accumulator, "codes", real)
    ref = bin_table(open_table(df), BinPlan(**plan, batch_rows=1_000, kernel="bincount"))
    a, b = got.stats["x"], ref.stats["x"]
    assert_array_equal(a.key, b.key)
    assert_array_equal(a.n, b.n)
    assert_allclose(a.s1, b.s1, rtol=1e-9, atol=1e-9)
