"""Disclosure control: small-cell suppression, complementary suppression, bin merging, --min-cell.

Standard: US CMS cell size suppression policy (ResDAC, version 01/26/2024; METHODS §14): no count
from 1 to 10 may be shown or be recoverable from other cells or totals; zero may be shown.
The hand-worked cases below are written inline.
"""
import json

import numpy as np
import pandas as pd

from scanner.report.disclosure import (guard_window_counts, merge_sparse, protect_group,
                                       reconcile, scrub, tighten)

from .conftest import run_cli


def test_protect_group_hand_worked():
    # One small cell with a shown total: it could be recovered by subtraction, so the next
    # smallest cell is suppressed too (complementary suppression, CMS policy).
    assert protect_group([100, 5], 11) == ([None, None], True)
    # Two small cells that together hold fewer than 11: their sum would be a small count.
    assert protect_group([100, 5, 3, 50], 11) == ([100, None, None, None], True)
    # Two small cells holding 11 or more together are enough.
    assert protect_group([100, 6, 7], 11) == ([100, None, None], True)
    # Zero may be shown; nothing to protect.
    assert protect_group([100, 0], 11) == ([100, 0], True)
    # No total shown: only the small cells go.
    assert protect_group([100, 5], 11, total_shown=False) == ([100, None], True)
    # All parts together small: the total itself must go.
    assert protect_group([3, 4], 11) == ([None, None], False)


def test_merge_sparse_hand_worked():
    # Bins from the cutoff outward: the sparse 3rd bin merges outward with the 4th.
    assert merge_sparse([20, 15, 4, 9], [10, 7, 2, 4], False, 11) == [[0], [1], [2, 3]]
    # 0/1 column: bin 0 has 12 rows of which 2 are ones → 2 is a count → merged.
    assert merge_sparse([12, 30], [2, 15], True, 11) == [[0, 1]]
    # a side that cannot reach 11 rows is hidden
    assert merge_sparse([3, 4], [1, 1], False, 11) == []
    # empty bins are dropped unless kept (histograms show zero heights)
    assert merge_sparse([0, 20], [0, 5], False, 11) == [[1]]
    assert merge_sparse([0, 20], [0, 20], False, 11, keep_empty=True) == [[0], [1]]


def test_scrub_catches_count_fields_it_was_not_told_about():
    out, found = scrub({"a": {"n_treated": 5, "rows": 12, "rank": 3, "x": 4},
                        "period": [{"n": 7}, {"n": 40}], "counts": [3, 0, 50]}, 11)
    assert out == {"a": {"n_treated": None, "rows": 12, "rank": 3, "x": 4},
                   "period": [{"n": None}, {"n": 40}], "counts": [None, 0, 50]}
    assert len(found) == 3


def _write(tmp_path, n=3000, seed=5):
    """Small planted table (invented): a fuzzy uptake rule at 40, a few missing and repeat rows."""
    rng = np.random.default_rng(seed)
    score = np.round(rng.normal(40, 12, n), 1)
    treated = (rng.random(n) < np.clip(0.2 + 0.5 * (score >= 40), 0, 1)).astype(int)
    df = pd.DataFrame({"pid": [f"Q{i:05d}" for i in range(n)], "score": score,
                       "given": treated, "sex": rng.integers(0, 2, n),
                       "day": pd.to_datetime("2021-01-01") + pd.to_timedelta(rng.integers(0, 700, n), "D")})
    df.loc[:6, "score"] = np.nan                     # 7 rows missing the running variable
    df = pd.concat([df, df.iloc[100:104].assign(day=pd.Timestamp("2024-01-01"))])  # 4 repeats
    df.to_csv(tmp_path / "t.csv", index=False)
    (tmp_path / "spec.toml").write_text(
        'title = "small"\n[data]\nsource = "t.csv"\ndate = "day"\nunit = "pid"\nkeep = "first"\n'
        '[[running]]\ncolumn = "score"\nunit = "points"\n[treatments]\ncolumns = ["given"]\n'
        '[covariates]\ncolumns = ["sex"]\n', encoding="utf-8")
    return tmp_path / "spec.toml"


def test_small_scan_suppresses_and_report_min_cell(tmp_path):
    spec = _write(tmp_path)
    out = tmp_path / "out"
    r = run_cli("scan", spec, "--out", out, "--quiet")
    assert r.returncode == 0, r.stderr
    res = json.loads((out / "results.json").read_text())
    d = res["data"]
    # 4 repeat rows and 7 missing values are small: suppressed; rows_used = rows_read − 4 would
    # give the 4 back, so rows_used is suppressed as well (complementary suppression).
    assert d["rows_read"] == 3004
    assert d["rows_used"] is None
    assert all(x["rows"] is None for x in d["dropped"])
    assert res["disclosure"]["suppressed_counts"] >= 3
    html = (out / "report.html").read_text()
    assert "suppressed" in html and "id='suppression'" in html
    assert "2,997" not in html and "3,000" not in html   # neither rows_used figure leaks
    # `cutscan report DIR` rebuilds the same report from results.json alone
    first = (out / "report.html").read_bytes()
    r = run_cli("report", out)
    assert r.returncode == 0 and (out / "report.html").read_bytes() == first
    # a stricter rule at report time re-merges bins and re-suppresses
    r = run_cli("report", out, "--min-cell", "200")
    assert r.returncode == 0, r.stderr
    bins = pd.read_csv(out / "bins.csv")
    assert ((bins.n == 0) | (bins.n >= 200)).all()
    up = bins[bins.figure == "uptake"]
    ones = (up.n * up.value).round()
    assert (((ones == 0) | (ones >= 200)) & (((up.n - ones) == 0) | ((up.n - ones) >= 200))).all()
    assert "Minimum cell size 200" in (out / "report.html").read_text()
    # a smaller value cannot undo suppression
    r = run_cli("report", out, "--min-cell", "5")
    assert r.returncode == 2 and "cannot restore suppressed counts" in r.stderr


def test_tighten_keeps_bins_consistent():
    bins = [{"side": "right", "x_low": 0.0, "x_high": 1.0, "x": 0.5, "mean": 0.5, "n": 20},
            {"side": "right", "x_low": 1.0, "x_high": 2.0, "x": 1.5, "mean": 0.25, "n": 40}]
    res = {"data": {"rows_read": 60, "rows_used": 60, "dropped": []},
           "disclosure": {"min_cell": 11, "rule": "counts from 1 to 10 ..."},
           "candidates": [{"cutoff": 0.0, "n_left": 12, "n_right": 60,
                           "plot": {"bins": bins, "binary": True}}]}
    t = tighten(res, 15)
    b = t["candidates"][0]["plot"]["bins"]
    # 20 rows (10 ones) merged with 40 rows (10 ones): 60 rows, 20 ones — hand-worked.
    assert len(b) == 1 and b[0]["n"] == 60 and abs(b[0]["mean"] - 20 / 60) < 1e-12
    assert t["candidates"][0]["n_left"] is None and t["candidates"][0]["n_right"] == 60
    assert res["candidates"][0]["n_left"] == 12        # the input is not modified
    # at 31 the merged bin's 20 ones are still a small count: the side is hidden
    t = tighten(res, 31)
    assert t["candidates"][0]["plot"]["bins"] == [] and t["disclosure"]["hidden_sides"] == 1


def test_min_cell_option_on_every_command():
    from scanner.cli import _parser
    p = _parser()
    for cmd in ("scan", "demo", "report"):
        args = p.parse_args([cmd, "x", "--min-cell", "25"] if cmd != "demo" else [cmd, "--min-cell", "25"])
        assert args.min_cell == 25, cmd


def test_window_count_is_nulled_when_bins_give_it_away():
    # Hand-worked: 100 rows inside the bandwidth on the left, bins from the cutoff hold 50 and
    # 55 rows; 105 − 100 = 5 rows would be revealed just beyond the window edge.
    bins = [{"side": "left", "x_low": 9.0, "x_high": 10.0, "n": 50},
            {"side": "left", "x_low": 8.0, "x_high": 9.0, "n": 55},
            {"side": "right", "x_low": 10.0, "x_high": 11.0, "n": 80}]
    row = {"cutoff": 10.0, "n_left": 100, "n_right": 60, "plot": {"bins": bins}}
    assert guard_window_counts(row, 11) == 1
    assert row["n_left"] is None and row["n_right"] == 60     # 80 − 60 = 20 is allowed


def test_reconcile_removes_differencing_between_figures():
    # Hand-worked: uptake runs from the cutoff hold 50 and 110 rows; density runs 30, 55, 105.
    # 55 − 50 = 5 → merge density bins 2 and 3 → runs 30, 105; 110 − 105 = 5 → drop the
    # outermost → runs 30 (differences 20 and 80 are allowed).
    up = [{"side": "right", "x_low": 0.0, "x_high": 1.0, "n": 50},
          {"side": "right", "x_low": 1.0, "x_high": 2.0, "n": 60}]
    dens = [{"side": "right", "x_low": 0.0, "x_high": 0.5, "n": 30, "height": 0.6},
            {"side": "right", "x_low": 0.5, "x_high": 1.1, "n": 25, "height": 0.25 / 0.6},
            {"side": "right", "x_low": 1.1, "x_high": 1.8, "n": 50, "height": 0.5 / 0.7}]
    out, changed = reconcile(up, dens, 0.0, 11)
    assert [b["n"] for b in out] == [30] and changed == 2
    out, changed = reconcile(up, dens[:2], 0.0, 11)   # 55 − 50 = 5 at the outer edge: dropped
    assert [b["n"] for b in out] == [30] and changed == 1
    # a merge without a drop: heights are width-weighted, so height = n / (N · width) still
    # holds (N = 100 rows in this hand-worked case)
    up2 = [dict(up[0]), dict(up[1], n=150)]
    out, changed = reconcile(up2, dens, 0.0, 11)
    assert [b["n"] for b in out] == [30, 75] and changed == 1
    assert abs(out[1]["height"] - 75 / (100 * 1.3)) < 1e-12 and out[1]["x_low"] == 0.5


def test_counts_written_in_sentences_are_suppressed_too():
    # US CMS cell-size suppression policy: no count from 1 to 10 is shown, also when a warning,
    # note or reason writes it into a sentence ("8 rows hold 999"). Large counts and decimals stay.
    from scanner.report.disclosure import scrub
    res = {"warnings": [{"kind": "sentinel_values", "column": "egfr", "count": 8,
                         "message": "column 'egfr': 8 rows hold 999; 1 row at 4.9, 1,204 rows at 5"}],
           "notes": ["3 persons appear twice"],
           "candidates": [{"reasons": ["rows left: 10 rows; bandwidth 2.5 rows"]}]}
    out, _ = scrub(res, 11)
    assert out["warnings"][0]["message"] == ("column 'egfr': fewer than 11 rows hold 999; fewer "
                                             "than 11 rows at 4.9, 1,204 rows at 5")
    assert out["warnings"][0]["count"] is None
    assert out["notes"] == ["fewer than 11 persons appear twice"]
    assert out["candidates"][0]["reasons"] == ["rows left: fewer than 11 rows; bandwidth 2.5 rows"]


def test_small_counts_in_identifier_and_possessive_wording_are_suppressed():
    # The repeated-identifier warning wrote "5 of the first 900 rows …" (the 5 escaped the
    # pattern), and "1 person's rows" became "fewer than 11 persons's rows".
    from scanner.report.disclosure import scrub_text
    assert scrub_text("5 rows of the first 900 share a value", 11) == \
        "fewer than 11 rows of the first 900 share a value"
    assert scrub_text("1 person's rows", 11) == "fewer than 11 persons' rows"
    assert scrub_text("12 rows and 40 persons' visits", 11) == "12 rows and 40 persons' visits"


def test_repeated_identifier_warning_with_few_repeats_is_suppressed():
    # End to end: a person_id repeating on 5 of 900 rows.  The warning is written with its
    # count next to "rows" so that output suppression reaches it; no bare 5 may remain.
    import numpy as np
    import pandas as pd
    from scanner.guards import unit_repeats
    from scanner.io import open_table
    from scanner.report.disclosure import scrub_text
    from scanner.spec import parse_spec
    ids = np.r_[np.arange(895), np.arange(5)]
    df = pd.DataFrame({"person_id": ids, "x": np.arange(900) % 40 * 1.0,
                       "d": (np.arange(900) % 3 == 0) * 1.0})
    spec = parse_spec({"running": [{"column": "x"}], "treatments": {"columns": ["d"]}})
    w = unit_repeats(open_table(df), spec)
    assert len(w) == 1 and "5 rows of the first 900" in w[0]["message"]
    out = scrub_text(w[0]["message"], 11)
    assert "fewer than 11 rows of the first 900" in out
    assert " 5 " not in f" {out} " and "(5" not in out
