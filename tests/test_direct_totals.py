"""The compiled pass adding rows straight to the running totals, held in the pass's own layout.

With period or half keys the rows of a batch are held in order of their (period, half) code and
split between two threads where the code changes; a variable keyed at least that finely has no
group on both sides, and both threads add its rows to its totals.  The totals keep only the
sums the batches need (:class:`scanner.engines.compact.Layout`), widened when a later batch
needs more.  The reference throughout is the numpy bincount kernel (one ``np.bincount`` per
sum), and for two sums pandas on the raw rows.
"""
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from scanner.engines import BinPlan, bin_table
from scanner.io import open_table

from .test_engines import EXACT_FIELDS, SUM_FIELDS, assert_same_stats, irregular_table, IRR


def _same_bits(a, b):
    for f in EXACT_FIELDS + SUM_FIELDS:
        assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f)


def _known_sums_table(n=2400, seed=21):
    """Invented rows whose columns are complete and 0/1 in the first batches only: a 0/1
    covariate missing from row 1300, a continuous one from 1900, the treatment from 2100; a
    half-integer running variable and a visit date over six years."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({"x": rng.integers(0, 60, n) * 0.5, "d": (rng.random(n) < 0.4) * 1.0,
                       "flag": (rng.random(n) < 0.3) * 1.0, "y": rng.normal(size=n),
                       "visit": pd.to_datetime("2015-01-01")
                       + pd.to_timedelta(rng.integers(0, 2200, n), "D")})
    df.loc[1300::7, "flag"] = np.nan
    df.loc[1900::5, "y"] = np.nan
    df.loc[2100:2140, "d"] = np.nan
    return df


PLAN = dict(running=("x",), columns=("d", "flag", "y"), treatments=("d",),
            pairs=(("d", "y"), ("flag", "y"), ("d", "flag")))


@pytest.mark.parametrize("keys", [dict(date="visit", split_seed=3),
                                  dict(date="visit", periods={"x": "quarter"}),
                                  dict(split_seed=3)])
def test_totals_widen_when_later_batches_need_more_sums(keys, monkeypatch):
    # The first batches need neither y² of the 0/1 columns nor any count or joint sum; the
    # later ones do, so the totals are widened mid-pass, with the earlier batches' sums kept.
    df = _known_sums_table()
    ref = bin_table(open_table(df), BinPlan(**PLAN, **keys, batch_rows=500, kernel="bincount"))
    got = {}
    for workers in ("1", "2"):
        monkeypatch.setenv("CUTSCAN_WORKERS", workers)
        got[workers] = bin_table(open_table(df), BinPlan(**PLAN, **keys, batch_rows=500))
        assert_same_stats(got[workers].stats["x"], ref.stats["x"])
    st = got["2"].stats["x"]
    # pandas on the raw rows, whatever the period and half keys: Σflag² and the joint count of
    # (flag, y) per value of x
    by = pd.DataFrame({"x": st.key, "s2": st.s2[:, 1], "pn": st.pn[:, 1]}).groupby("x").sum()
    g = df.groupby("x")
    assert_allclose(by.s2.to_numpy(), g.flag.apply(lambda v: (v.dropna() ** 2).sum()).to_numpy())
    both = df.flag.notna() & df.y.notna()
    assert_array_equal(by.pn.to_numpy(), both.groupby(df.x).sum().to_numpy())


@pytest.mark.parametrize("keys", [dict(date="visit", split_seed=3),
                                  dict(date="visit", split_seed=3,
                                       periods={"skew": "quarter", "half": "year", "five": "none"}),
                                  dict(split_seed=3)])
def test_keyed_totals_do_not_depend_on_the_number_of_threads(keys, monkeypatch):
    # Each slot's rows are added by one thread, in the order the rows are held: one thread or
    # two give the same bits.
    df = irregular_table()
    got = {}
    for workers in ("1", "2"):
        monkeypatch.setenv("CUTSCAN_WORKERS", workers)
        got[workers] = bin_table(open_table(df), BinPlan(**IRR, **keys, batch_rows=700))
    for r in IRR["running"]:
        _same_bits(got["1"].stats[r], got["2"].stats[r])


def test_batches_within_one_period_fall_back_to_the_groups_matrix(monkeypatch):
    # A table sorted by date with no halves: most 300-row batches lie within one year, where
    # rows cannot be split between the threads by their code, and are folded into the batch's
    # groups first; the others straddle a new year and go straight to the totals.
    from scanner.engines import batchfold
    df = irregular_table().sort_values("visit", kind="stable").reset_index(drop=True)
    keys = dict(date="visit", periods={"skew": "year", "half": "year", "five": "year"})
    ref = bin_table(open_table(df), BinPlan(**IRR, **keys, batch_rows=300, kernel="bincount"))
    real = batchfold.fold_together
    ways = []

    def counted(acc, running, parts, *a):
        ways.append(tuple(p is None or p[2] is None for p in parts))
        return real(acc, running, parts, *a)
    monkeypatch.setattr("scanner.engines.local.fold_together", counted)
    got = bin_table(open_table(df), BinPlan(**IRR, **keys, batch_rows=300))
    for r in IRR["running"]:
        assert_same_stats(got.stats[r], ref.stats[r])
    assert any(all(w) for w in ways) and any(not any(w) for w in ways)


@pytest.mark.parametrize("code, expect", [
    ([0, 0, 0, 1, 1, 1, 1, 1], 3),           # the nearer boundary to the middle (4)
    ([0, 0, 1, 1, 1, 1, 1, 2], 2),           # both at distance 2: the lower
    ([1, 1, 1, 1, 1, 1, 1, 2], None),        # 7 rows against 1
    ([4] * 8, None),                         # one code
    ([0, 1], 1)])
def test_middle_is_a_code_boundary_near_the_middle(code, expect):
    from scanner.engines.local import _middle
    assert _middle(np.array(code, np.int32)) == expect


def test_scan_of_a_messy_dated_extract_equals_the_numpy_kernel(tmp_path, monkeypatch):
    # The whole scan on our messy extract (tests/messy_extract.py: HbA1c in two units with a
    # unit column, missing codes -99 and 999, an LDL rule at 190 mg/dL falling between values
    # recorded to 0.1 mmol/L, a flag that is always 0, a visit date over two and a half years)
    # runs the keyed pass with rows going straight to the totals and float64 columns read in
    # place.  Reference: the same scan with the numpy bincount kernel; every candidate's
    # numbers agree to 1e-7 (the bins to 1e-9; the fits add a few roundings).
    import scanner
    from tests.messy_extract import write
    spec, _ = write(tmp_path, "parquet", unit_column=True)
    got = scanner.scan(spec).candidates
    for mod in ("scanner.engines.local", "scanner.engines.accumulate"):
        monkeypatch.setattr(f"{mod}._kernel", lambda name: "bincount")
    ref = scanner.scan(spec).candidates
    assert len(got) == len(ref) > 0
    assert got.select_dtypes(exclude="number").equals(ref.select_dtypes(exclude="number"))
    num = ref.select_dtypes(include="number").columns
    assert_allclose(got[num].to_numpy(float), ref[num].to_numpy(float), rtol=1e-7, atol=1e-9,
                    equal_nan=True)
