"""keep = "first" per running variable: each unit's earliest row that holds that variable's value.

Reference: a direct pandas computation on the invented rows (sort by date, then file order; drop
rows without the value; first row per person) — the definition written out independently.
"""
import numpy as np
import pandas as pd
from numpy.testing import assert_allclose

from scanner.scan import scan


def visits(n_persons=900, seed=8):
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(n_persons):
        for k in range(rng.integers(1, 5)):
            rows.append((f"P{p:05d}", np.datetime64("2021-01-01") + int(rng.integers(0, 700))))
    df = pd.DataFrame(rows, columns=["pt", "visit"])
    n = len(df)
    df["hba1c"] = np.round(rng.normal(6.4, 0.8, n), 1)
    df.loc[rng.random(n) < 0.45, "hba1c"] = np.nan        # many visits without an HbA1c
    df["egfr"] = np.round(rng.normal(60, 20, n))
    df["treated"] = (rng.random(n) < 0.2 + 0.5 * (df.hba1c.fillna(0) >= 6.5)).astype(int)
    df["age"] = rng.integers(30, 80, n)
    return df


def spec(tmp_path, df):
    df.to_parquet(tmp_path / "v.parquet", index=False)
    p = tmp_path / "spec.toml"
    p.write_text('[data]\nsource = "v.parquet"\ndate = "visit"\nunit = "pt"\nkeep = "first"\n'
                 '[[running]]\ncolumn = "hba1c"\n[[running]]\ncolumn = "egfr"\n'
                 '[treatments]\ncolumns = ["treated"]\n[search]\nround_numbers = false\n'
                 'discover = false\n')
    return p


def firsts(df, col):
    d = df.reset_index().rename(columns={"index": "row"})
    d = d[d[col].notna()].sort_values(["visit", "row"], kind="stable")
    return d.drop_duplicates("pt", keep="first")


def test_first_row_holding_each_running_variable(tmp_path):
    df = visits()
    res = scan(spec(tmp_path, df))
    for col in ("hba1c", "egfr"):
        ref = firsts(df, col)
        st = res.stats[col]
        assert st.total == len(ref) == ref.pt.nunique()
        assert st.total == df.loc[df[col].notna(), "pt"].nunique()    # every person with a value
        # the kept rows are those rows: same running values and the same treatment sums
        assert_allclose(st.sx.sum(), ref[col].sum(), rtol=1e-12)
        assert st.column_sums("treated")[2].sum() == ref.treated.sum()
    # the person-first row (often without HbA1c) would have lost persons under the old rule
    earliest = df.reset_index().sort_values(["visit", "index"]).drop_duplicates("pt")
    assert earliest.hba1c.notna().sum() < res.stats["hba1c"].total
    dropped = {(d["column"], d["reason"]): d["rows"] for d in res.data["dropped"]}
    assert res.data["rows_read"] == len(df)
    assert res.data["rows_used"] + dropped[("pt", "repeat rows of a unit (keep = first)")] == len(df)
