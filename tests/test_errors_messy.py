"""Messy columns are parsed the one way they can be read, or refused — never silently misread.

Each test builds a clean invented table and a messy rendering of the same values, and checks
that the messy one gives the same BinnedStats (exact counts, sums to 1e-12) or a clear refusal.
"""
import decimal

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from scanner.errors import InputError
from scanner.scan import scan


def clean_frame(n=400, seed=5):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 60, n) * 50 + 1000          # 1000 .. 3950: thousands separators appear
    return pd.DataFrame({"pid": [f"{i % 300:05d}" for i in range(n)], "score": x.astype(float),
                         "treated": (rng.random(n) < 0.2 + 0.6 * (x >= 2500)).astype(float),
                         "age": rng.normal(50, 10, n).round(1),
                         "visit": pd.Timestamp("2020-01-01") + pd.to_timedelta(rng.integers(0, 900, n), "D")})


def spec_text(source, data=""):
    return (f'[data]\nsource = "{source}"\ndate = "visit"\n{data}\n[[running]]\ncolumn = "score"\n'
            '[treatments]\ncolumns = ["treated"]\n[covariates]\ncolumns = ["age"]\n'
            '[search]\nround_numbers = true\n')


def run(tmp, name, write, data=""):
    path = tmp / name
    write(path)
    spec = tmp / f"{name}.toml"
    spec.write_text(spec_text(name, data))
    return scan(spec)


def same_stats(a, b):
    sa, sb = a.stats["score"], b.stats["score"]
    assert_array_equal(sa.key, sb.key)
    assert_array_equal(sa.period, sb.period)
    assert_array_equal(sa.n, sb.n)
    assert_array_equal(sa.cnt, sb.cnt)
    assert_allclose(sa.s1, sb.s1, rtol=1e-12)
    assert_allclose(sa.s2, sb.s2, rtol=1e-12)
    assert_allclose(sa.sx, sb.sx, rtol=1e-12)


@pytest.fixture
def base(tmp_path):
    df = clean_frame()
    return df, run(tmp_path, "clean.parquet", lambda p: df.to_parquet(p, index=False))


def test_numbers_as_text_with_blanks_and_thousands_separators(tmp_path, base):
    df, ref = base
    messy = df.assign(score=[f" {v:,.0f} " for v in df.score], age=df.age.map(lambda v: f"{v:.1f}"))
    got = run(tmp_path, "m.parquet", lambda p: messy.to_parquet(p, index=False))
    same_stats(ref, got)


def test_thousands_separators_in_csv(tmp_path, base):
    df, ref = base
    messy = df.assign(score=[f"{v:,.0f}" for v in df.score], visit=df.visit.dt.strftime("%Y-%m-%d"))
    got = run(tmp_path, "m.csv", lambda p: messy.to_csv(p, index=False))   # quoted "1,250"
    same_stats(ref, got)


def test_yes_no_and_true_false_treatments(tmp_path, base):
    df, ref = base
    for yes, no in (("Y", "N"), ("yes", "no"), ("TRUE", "false"), ("t", "F")):
        messy = df.assign(treated=np.where(df.treated == 1, yes, no))
        same_stats(ref, run(tmp_path, f"b{yes}.parquet", lambda p: messy.to_parquet(p, index=False)))


def test_declared_missing_codes_global_and_per_column(tmp_path):
    df = clean_frame()
    rng = np.random.default_rng(1)
    coded = df.copy()
    i, j, k = rng.choice(len(df), 30, replace=False).reshape(3, 10)
    coded.loc[i, "score"] = 999.0
    coded.loc[j, "age"] = -1.0
    coded["age"] = coded["age"].astype(object)
    coded.loc[k, "age"] = "unknown"
    coded["age"] = coded["age"].astype(str)
    truth = df.copy()
    truth.loc[i, "score"] = np.nan
    truth.loc[np.r_[j, k], "age"] = np.nan
    ref = run(tmp_path, "t.parquet", lambda p: truth.to_parquet(p, index=False))
    got = run(tmp_path, "c.parquet", lambda p: coded.to_parquet(p, index=False),
              data='missing = [999]\n[data.missing_by_column]\nage = [-1, "unknown"]')
    same_stats(ref, got)
    counts = {m["column"]: m["values"] for m in got.data["missing_codes"] if m["values"]}
    assert counts == {"score": 10, "age": 20}
    assert got.data["rows_read"] == len(df)


def test_missing_codes_reach_text_values_in_csv(tmp_path):
    df = clean_frame()
    messy = df.assign(visit=df.visit.dt.strftime("%Y-%m-%d"))
    messy["age"] = messy["age"].astype(str)
    messy.loc[300:, "age"] = "72+"          # beyond the first rows: the codes must reach the parser
    truth = df.copy()
    truth.loc[300:, "age"] = np.nan
    ref = run(tmp_path, "t.parquet", lambda p: truth.to_parquet(p, index=False))
    got = run(tmp_path, "m.csv", lambda p: messy.to_csv(p, index=False),
              data='[data.missing_by_column]\nage = ["72+"]')
    same_stats(ref, got)


@pytest.mark.parametrize("fmt", ["%Y-%m-%d", "%Y-%m-%dT%H:%M:%S", "%Y/%m/%d", "%Y%m%d", "%d.%m.%Y",
                                 "%d-%b-%Y", "%d%b%Y", "%d/%m/%Y", "%m/%d/%Y", "%d-%m-%Y"])
def test_dates_in_common_formats(tmp_path, base, fmt):
    df, ref = base
    messy = df.assign(visit=df.visit.dt.strftime(fmt))
    same_stats(ref, run(tmp_path, "d.parquet", lambda p: messy.to_parquet(p, index=False)))


def test_integer_yyyymmdd_dates_and_date_format_key(tmp_path, base):
    df, ref = base
    ints = df.assign(visit=df.visit.dt.strftime("%Y%m%d").astype(int))
    same_stats(ref, run(tmp_path, "i.csv", lambda p: ints.to_csv(p, index=False)))
    ambiguous = df.assign(visit=df.visit.dt.strftime("%d/%m/%y"))       # 2-digit years
    same_stats(ref, run(tmp_path, "a.parquet", lambda p: ambiguous.to_parquet(p, index=False),
                        data='date_format = "%d/%m/%y"'))
    with pytest.raises(InputError, match="which is not a date"):
        run(tmp_path, "b.parquet", lambda p: ambiguous.to_parquet(p, index=False))


def test_parquet_categorical_decimal_and_timestamp_types(tmp_path, base):
    df, ref = base
    t = pa.table({
        "pid": pa.array(df.pid).dictionary_encode(),
        "score": pa.array([decimal.Decimal(f"{v:.2f}") for v in df.score], pa.decimal128(9, 2)),
        "treated": pa.array(df.treated.astype(int).astype(str)).dictionary_encode(),
        "age": pa.array(df.age.map(lambda v: f"{v:.1f}")).dictionary_encode(),
        "visit": pa.array(df.visit, pa.timestamp("ms", tz="UTC")),
    })
    same_stats(ref, run(tmp_path, "t.parquet", lambda p: pq.write_table(t, p)))
    dates = df.assign(visit=df.visit.dt.date)
    same_stats(ref, run(tmp_path, "dd.parquet", lambda p: dates.to_parquet(p, index=False)))


def test_byte_order_mark_and_quoted_newlines_across_blocks(tmp_path, base):
    df, ref = base
    big = pd.concat([df] * 150, ignore_index=True)      # ~60,000 rows: several CSV blocks
    big["note"] = "line one\nline two, with a comma"      # a quoted newline in every row
    csv = big.assign(visit=big.visit.dt.strftime("%Y-%m-%d")).to_csv(index=False)
    (tmp_path / "bom.csv").write_bytes(b"\xef\xbb\xbf" + csv.encode())
    spec = tmp_path / "bom.toml"
    spec.write_text(spec_text("bom.csv"))
    got = scan(spec)
    truth = run(tmp_path, "big.parquet", lambda p: big.to_parquet(p, index=False))
    same_stats(truth, got)
    assert got.data["rows_read"] == len(big)


@pytest.mark.parametrize("delim,ext", [(";", "csv"), ("\t", "tsv"), ("|", "txt")])
def test_other_delimiters(tmp_path, base, delim, ext):
    df, ref = base
    messy = df.assign(visit=df.visit.dt.strftime("%Y-%m-%d"))
    same_stats(ref, run(tmp_path, f"d.{ext}", lambda p: messy.to_csv(p, index=False, sep=delim)))


def test_decimal_commas_read_or_refused_never_misread(tmp_path, base):
    df, ref = base
    comma = df.assign(age=df.age.map(lambda v: f"{v:.1f}".replace(".", ",")))
    got = run(tmp_path, "c.parquet", lambda p: comma.to_parquet(p, index=False))
    same_stats(ref, got)                                  # read as the decimals they are
    w = [x for x in got.warnings if x["kind"] == "decimal_comma"]
    assert [(x["column"], x["count"]) for x in w] == [("age", len(df))]
    with pytest.raises(InputError, match="decimal comma"):
        run(tmp_path, "c2.parquet", lambda p: comma.to_parquet(p, index=False), data='decimal = "."')
    # '1,25' cannot be a thousands group: with decimal = "." it is refused, not read as 125
    bad_group = df.assign(score=[f"{v:.0f}"[:1] + "," + f"{v:.0f}"[1:3] for v in df.score])
    with pytest.raises(InputError, match="holds text that is not a number"):
        run(tmp_path, "g.parquet", lambda p: bad_group.to_parquet(p, index=False), data='decimal = "."')
    # a column read with thousands separators cannot turn to decimal commas part-way
    flip = df.assign(score=[f"{v:,.0f}" for v in df.score]).astype({"score": object})
    flip.loc[len(flip) - 1, "score"] = "2,5"
    with pytest.raises(InputError, match="mixes decimal points and decimal commas|set \\[data\\] decimal"):
        run(tmp_path, "f.csv", lambda p: flip.assign(visit=flip.visit.dt.strftime("%Y-%m-%d"))
            .to_csv(p, index=False), data="batch_rows = 100")
    mixed = df.assign(treated=np.where(df.treated == 1, "Y", "maybe"))
    with pytest.raises(InputError, match=r"'maybe'"):
        run(tmp_path, "y.parquet", lambda p: mixed.to_parquet(p, index=False))


def test_decimal_commas_counted_once_with_a_declared_code(tmp_path, base):
    # A declared missing code makes the cleaning parse a text column a second time (to tell
    # which cells the code turned missing); its decimal commas must still be counted once.
    df, _ = base
    age = [f"{v:.1f}".replace(".", ",") for v in df.age]
    age[::25] = ["999"] * len(age[::25])
    comma = df.assign(age=age)
    got = run(tmp_path, "c.parquet", lambda p: comma.to_parquet(p, index=False),
              data="missing = [999]")
    w = [x for x in got.warnings if x["kind"] == "decimal_comma"]
    assert [(x["column"], x["count"]) for x in w] == [("age", len(df) - len(age[::25]))]


def test_inputs_are_never_modified(tmp_path, base):
    df, _ = base
    path = tmp_path / "keep.csv"
    df.assign(score=[f"{v:,.0f}" for v in df.score]).to_csv(path, index=False)
    before = path.read_bytes(), path.stat().st_mtime_ns
    spec = tmp_path / "keep.toml"
    spec.write_text(spec_text("keep.csv", 'unit = "pid"\nkeep = "first"\nmissing = [999]'))
    spec_before = spec.read_bytes()
    scan(spec)
    assert (path.read_bytes(), path.stat().st_mtime_ns) == before
    assert spec.read_bytes() == spec_before


def test_missing_code_counts_survive_keep_first(tmp_path):
    df = clean_frame()
    df.loc[:9, "score"] = 999.0
    df["pid"] = [f"{i:05d}" for i in range(len(df))]          # every unit once: nothing deduplicated
    got = run(tmp_path, "k.parquet", lambda p: df.to_parquet(p, index=False),
              data='unit = "pid"\nkeep = "first"\nmissing = [999]')
    counts = {m["column"]: m["values"] for m in got.data["missing_codes"]}
    assert counts["score"] == 10
