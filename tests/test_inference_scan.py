"""Inference fields in scan results, spec keys and the stability rule (invented data)."""
import math

import numpy as np
import pandas as pd
import pytest

from scanner import scan
from scanner.errors import SpecError
from scanner.score import flags, stability, subscores
from scanner.spec import parse_spec


def _data(n=20000, support=None, seed=4):
    rng = np.random.default_rng(seed)
    x = rng.integers(-60, 60, n).astype(float) if support is None else rng.choice(support, n)
    d = (rng.random(n) < 0.2 + 0.5 * (x >= 0) + 0.002 * x).astype(float)
    return pd.DataFrame({"x": x, "d": d})


def _spec(**search):
    return {"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
            "search": {"round_numbers": True, "discover": False, **search}}


def _row(res, cutoff=0.0):
    return next(r for r in res.rows if r["cutoff"] == cutoff)


FIELDS = ("jump", "jump_bc", "se", "se_robust", "ci_low", "ci_high", "ci_low_conventional",
          "ci_high_conventional", "ci_low_honest", "ci_high_honest", "honest_bound_M",
          "p_value", "bandwidth", "bandwidth_method", "interval", "sensitivity")


@pytest.mark.parametrize("bw,label", [("mse", "mse"), ("cer", "cer"), ("ik", "ik"), (12, "fixed")])
def test_scan_reports_robust_interval_and_method(bw, label):
    res = scan(_spec(bandwidth=bw), data=_data())
    r = _row(res)
    for f in FIELDS:
        assert f in r, f
    assert r["bandwidth_method"] == label
    assert r["interval"] == "robust"
    assert (r["ci_low"], r["ci_high"]) != (r["ci_low_conventional"], r["ci_high_conventional"])
    assert r["ci_low"] < r["jump_bc"] < r["ci_high"]
    assert abs(r["jump"] - 0.5) < 0.1
    out = res.to_dict()["candidates"]
    assert all("jump_bc" in c and "se_robust" in c for c in out if c["jump"] is not None)


def test_cer_is_mse_times_n_to_minus_one_twentieth():
    # Calonico, Cattaneo & Farrell (2020), p = 1 rule of thumb (before widening, which does not
    # bind on this data).
    df = _data()
    df["x"] = np.round(df.x + np.random.default_rng(1).uniform(0, 1, len(df)), 2)
    a, b = _row(scan(_spec(), data=df)), _row(scan(_spec(bandwidth="cer"), data=df))
    assert a["bandwidth_note"] is None and b["bandwidth_note"] is None
    assert math.isclose(b["bandwidth"], a["bandwidth"] * len(df) ** -0.05, rel_tol=1e-9)


def test_per_side_bandwidths_recorded():
    r = _row(scan(_spec(per_side=True), data=_data()))
    assert r["bandwidth_method"] == "mse-sides"
    assert r["bandwidth_left"] != r["bandwidth_right"]


def test_coarse_candidate_reports_honest_interval():
    # Four support values per side: coarse by the scan's rule, so the bias-aware interval is used.
    res = scan(_spec(), data=_data(support=np.array([-4.0, -3, -2, -1, 0, 1, 2, 3])))
    r = _row(res)
    assert "coarse" in r["flags"]
    assert r["interval"] == "honest"
    assert (r["ci_low"], r["ci_high"]) == (r["ci_low_honest"], r["ci_high_honest"])
    assert r["honest_bound_M"] >= 0


def test_spec_bandwidth_keys():
    assert parse_spec(_spec()).bandwidth == "mse"
    assert parse_spec(_spec(bandwidth="cer", per_side=True)).per_side is True
    with pytest.raises(SpecError, match=r"bandwidth = 'msee' \(did you mean 'mse'\?\)"):
        parse_spec(_spec(bandwidth="msee"))
    with pytest.raises(SpecError, match="per_side = 'yes' must be true or false"):
        parse_spec(_spec(per_side="yes"))


def test_stability_rule():
    runs = [{"jump": 0.52, "se": 0.07}, {"jump": 0.49, "se": 0.03}]
    row = {"jump": 0.5, "se": 0.05, "sensitivity": runs}
    S, rel = stability(row)
    # z = |Δ| / max(√|s_v² − s²|, s/2): 0.02/√(0.0049−0.0025) and 0.01/0.04.
    assert math.isclose(S, max(0.02 / math.sqrt(0.0024), 0.01 / 0.04), rel_tol=1e-12)
    row.update(stability_z=S, stability_shift=rel)
    assert subscores(row)["stability"] == 1.0
    assert "unstable" not in flags(row, 0.05)
    row.update(stability_z=5.0, stability_shift=0.4)
    assert subscores(row)["stability"] == 0.0
    assert "unstable" in flags(row, 0.05)
    row.update(stability_shift=0.1)   # statistically clear but small shift: not flagged
    assert "unstable" not in flags(row, 0.05)


def test_robust_p_value_feeds_q_values():
    res = scan(_spec(), data=_data())
    for r in res.rows:
        if r.get("interval") == "robust":
            assert r["p_value"] == r["p_value_robust"]


def test_stability_compares_with_the_run_at_h():
    # The 1 × h run (same variance estimator as the others) is the reference when present.
    runs = [{"variant": "h×1", "jump": 0.5, "se": 0.04}, {"variant": "h×2", "jump": 0.53, "se": 0.03}]
    S, rel = stability({"jump": 0.5, "se": 0.05, "sensitivity": runs})
    assert math.isclose(S, 0.03 / math.sqrt(0.04 ** 2 - 0.03 ** 2), rel_tol=1e-12)
    assert math.isclose(rel, 0.06, rel_tol=1e-12)
