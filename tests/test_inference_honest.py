"""Never a confident wrong answer: sides without variation, the SE floor, the verdict words,
bounded shares, the headline record and dated rules (invented data; sources named per check)."""
import dataclasses
import importlib.util

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats as sps
from statsmodels.stats.proportion import proportion_confint

from scanner import scan
from scanner.estimate.kernels import KERNELS
from scanner.estimate.local import (AC_PSEUDO, SE_FLOOR_REL, SideData, fit_jump, floor_variance,
                                    side_data)
from scanner.headline import PRACTICAL_JUMP, Headline, bias_bounded_interval, build_headline
from scanner.score import SERIOUS

from .conftest import ROOT, binned

_spec_ = importlib.util.spec_from_file_location("honest_verdicts",
                                                ROOT / "benchmarks" / "honest_verdicts.py")
bench = importlib.util.module_from_spec(_spec_)
_spec_.loader.exec_module(bench)


def _spec(**search):
    return {"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
            "search": {"round_numbers": True, "discover": False, **search}}


# ------------------------------------------------------------------ no variation, no test
def test_treatment_equal_to_one_for_everybody_gets_zero_usable_candidates():
    rng = np.random.default_rng(1)
    x = rng.integers(0, 300, 30_000).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": np.ones_like(x)}))
    assert res.rows
    assert not [r for r in res.rows if r["verdict"] in ("usable", "caution", "doubtful")]
    for r in res.rows:
        if np.isfinite(r["jump"]):
            assert r["no_variation"] and r["verdict"] == "no jump"
            assert np.isnan(r["p_value"]) and np.isnan(r["q_value"])   # never a p-value
            assert "no variation" in r["reasons"][0]
            assert r["headline"]["interval"] == "none"


def test_everyone_above_140_treated_cutoff_160_is_not_usable():
    rng = np.random.default_rng(2)
    x = rng.integers(0, 300, 40_000).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": (x >= 140).astype(float)}))
    at = {r["cutoff"]: r for r in res.rows}
    assert at[160.0]["verdict"] == "no jump" and np.isnan(at[160.0]["p_value"])
    assert at[140.0]["verdict"] == "usable" and at[140.0]["jump"] == pytest.approx(1.0)
    assert at[140.0]["se"] > 1e-4           # not the collapsed 1e-17 of a zero-residual side


def _one_side_constant(seed=3, n=12_000):
    """Left: nobody treated; right: 60% treated, slope 0.002 (invented)."""
    rng = np.random.default_rng(seed)
    x = rng.integers(-40, 40, n).astype(float)
    d = np.where(x >= 0, rng.random(n) < 0.6 + 0.002 * x, 0.0).astype(float)
    return pd.DataFrame({"x": x, "d": d})


def test_one_constant_side_uses_agresti_coull_bernoulli_variance():
    df = _one_side_constant()
    d = side_data(binned(df, "x", ["d"], ["d"]), "d", 0.0)
    h = 15.0
    floored, var = floor_variance(d, h)
    assert var.constant_left and not var.constant_right and var.binary
    n_left = int(d.n[(~d.right) & (np.abs(d.u) < h)].sum())
    # Agresti & Coull (1998), from memory: add two successes and two failures.  statsmodels'
    # "agresti_coull" interval is centred at (x + z²/2)/(n + z²), z = 1.96: the same rule with
    # z rounded to 2, so the shares agree to within 0.1/n (checked at 5 successes, where
    # statsmodels does not clip the interval at 0).
    lo, hi = proportion_confint(5, n_left, method="agresti_coull")
    assert abs((5 + AC_PSEUDO) / (n_left + 2 * AC_PSEUDO) - (lo + hi) / 2) < 0.1 / n_left
    ours = AC_PSEUDO / (n_left + 2 * AC_PSEUDO)
    assert var.variance_left == pytest.approx(ours * (1 - ours), rel=1e-12)
    # Reference: statsmodels WLS with HC1 on pseudo rows whose left side has exactly that
    # per-row variance (each left bin's rows split evenly into mean ± σ̃; the estimate is
    # unchanged).  The floored bin fit must equal it.
    fit = fit_jump(None, "d", 0.0, h, data=floored)
    s = np.sqrt(var.variance_left)
    xs, ys = df.x.to_numpy(), df.d.to_numpy().copy()
    keep = np.ones(len(df), bool)
    for v in np.unique(xs[xs < 0]):
        idx = np.flatnonzero(xs == v)
        if idx.size % 2:
            keep[idx[-1]] = False           # an even count per bin: drop one row
            idx = idx[:-1]
        ys[idx[: idx.size // 2]] += s
        ys[idx[idx.size // 2:]] -= s
    d2 = side_data(binned(pd.DataFrame({"x": xs[keep], "d": df.d.to_numpy()[keep]}), "x",
                          ["d"], ["d"]), "d", 0.0)
    fit2 = fit_jump(None, "d", 0.0, h, data=floor_variance(d2, h)[0])
    u, y = xs[keep], ys[keep]
    w = KERNELS["triangular"](u / h)
    m = w > 0
    D = (u >= 0).astype(float)
    X = np.column_stack([np.ones_like(u), D, u, D * u])[m]
    ref = sm.WLS(y[m], X, weights=w[m]).fit(cov_type="HC1")
    assert_allclose(fit2.jump, ref.params[1], rtol=1e-10)
    # σ̃² differs slightly between the two samples (n_left changed by the dropped rows).
    assert_allclose(fit2.se, ref.bse[1], rtol=1e-3)
    assert fit.se > 0.005 and np.isfinite(fit.p_value)


def test_one_constant_side_scan_covers_the_planted_jump():
    res = scan(_spec(), data=_one_side_constant(seed=4, n=20_000))
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    assert r["variation"]["constant_left"] and "Agresti" in r["variation"]["method"]
    assert r["ci_low"] <= 0.6 <= r["ci_high"] and r["verdict"] == "usable"


def test_se_floor_is_relative_to_the_data_scale():
    # Constant 0.1 on both sides (0.1 is not exact in binary, so the sums carry rounding
    # error): the old fit gave SE ≈ 1e-17 and a "significant" rounding jump.
    u = np.arange(-20.0, 20.0)
    n = np.full(u.size, 7.0)
    for level in (0.1, 1e6 + 0.1):
        d = SideData(u, n, n * level, n * level * level, u >= 0)
        f = fit_jump(None, "", 0.0, 15.0, data=d)
        assert f.se >= SE_FLOOR_REL * level * (1 - 1e-12)
        assert f.p_value > 0.5
    # A deterministic non-binary step is still a clear jump: only the floor is left.
    d = SideData(u, n, n * np.where(u >= 0, 7e6, 5e6), n * np.where(u >= 0, 7e6, 5e6) ** 2,
                 u >= 0)
    f = fit_jump(None, "", 0.0, 15.0, data=floor_variance(d, 15.0)[0])
    assert f.se == pytest.approx(SE_FLOOR_REL * 7e6, rel=1e-6) and f.p_value < 1e-10


# ------------------------------------------------------------------ verdict words
def _row(lo, hi, q, jump=None, **kw):
    jump = (lo + hi) / 2 if jump is None else jump
    return {"jump": jump, "ci_low": lo, "ci_high": hi, "q_value": q, "p_value": q,
            "interval": "robust", "jump_bc": (lo + hi) / 2, "flags": [], "origin": "round", **kw}


@pytest.mark.parametrize("lo,hi,q,word", [
    (-1.16, -0.17, 0.10, "inconclusive"),     # the large, imprecise jump: not "no jump"
    (-0.05, 0.12, 0.60, "inconclusive"),      # holds 0 and +0.12
    (-0.05, 0.08, 0.60, "no jump"),           # rules out ±0.10
    (0.01, 0.03, 0.20, "no jump"),            # a tiny jump, not significant after adjustment
    (0.30, 0.50, 0.001, "usable"),
])
def test_verdict_words(lo, hi, q, word):
    assert build_headline(_row(lo, hi, q), 0.05, SERIOUS).verdict == word


def test_inconclusive_scan_row_says_the_data_cannot_tell():
    # 600 rows, a planted jump of 0.15: too few rows to tell (invented data).  The old scan
    # called this "no jump".
    rng = np.random.default_rng(6)
    x = rng.integers(-30, 31, 600).astype(float)
    d = (rng.random(600) < 0.3 + 0.15 * (x >= 0)).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": d}))
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    assert r["q_value"] >= 0.05 and r["ci_low"] < 0 and r["ci_high"] > PRACTICAL_JUMP
    assert r["verdict"] == "inconclusive"
    assert any("cannot tell" in s for s in r["reasons"])
    assert not any(s.startswith("no jump") for s in r["reasons"])


# ------------------------------------------------------------------ bounds
def test_intervals_of_share_jumps_stay_in_bounds_and_impossible_shares_are_flagged():
    # Uptake falls steeply to exactly 0 just left of the cutoff: a local line overshoots below 0.
    rng = np.random.default_rng(8)
    n = 60_000
    x = rng.uniform(-20, 20, n).round(1)
    p = np.where(x >= 0, 0.97, np.clip(0.6 * (-x - 3) / 17, 0, 1))
    d = (rng.random(n) < p).astype(float)
    res = scan(_spec(bandwidth=15), data=pd.DataFrame({"x": x, "d": d}))
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    for c in res.rows:
        for a, b in (("ci_low", "ci_high"), ("ci_low_robust", "ci_high_robust"),
                     ("ci_low_conventional", "ci_high_conventional"),
                     ("ci_low_honest", "ci_high_honest")):
            for k in (a, b):
                v = c.get(k)
                assert v is None or not np.isfinite(v) or -1 <= v <= 1, (c["cutoff"], k, v)
    assert r["left"] < 0                                   # the fit overshoots ...
    assert "impossible" in r["flags"]                      # ... beyond noise: a flag
    assert np.isnan(r["share_always"]) and "outside [0, 1]" in r["impossible_share"]
    assert any("outside [0, 1]" in s for s in r["reasons"])
    assert "from 0.00 to" in r["reasons"][0]               # displayed level within [0, 1]



def test_impossible_share_is_flagged_when_the_other_side_has_no_variation():
    # Compliance shares (Imbens & Angrist 1994, Econometrica 62(2); Angrist, Imbens & Rubin 1996,
    # JASA 91(434)): never-takers = 1 − p_in, so a fitted uptake limit above 1 is no share.
    # Left: nobody treated (a constant side, so its variance is floored); right: uptake exactly 1
    # up to 1.6 then 1.08 − 0.05u (invented, exact counts on an integer lattice), so the local
    # line overshoots 1.  The 0/1 check must use the raw data: the floored left side would no
    # longer look 0/1 and the overshoot went out as a never-taker share of −3%.
    m, h = 400, 10.0
    xs = np.arange(-30, 31, dtype=float)
    ones = np.round(m * np.where(xs >= 0, np.clip(1.08 - 0.05 * xs, 0, 1), 0)).astype(int)
    x = np.repeat(xs, m)
    d = np.concatenate([(np.arange(m) < k).astype(float) for k in ones])
    res = scan(_spec(bandwidth=h), data=pd.DataFrame({"x": x, "d": d}))
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    assert r["variation"]["constant_left"] and r["variation"]["binary"]
    # The right limit against a row-level triangular-kernel WLS fit (statsmodels).
    w = np.clip(1 - np.abs(x) / h, 0, None) * (x >= 0)
    keep = w > 0
    ref = sm.WLS(d[keep], sm.add_constant(x[keep]), weights=w[keep]).fit()
    assert_allclose(r["right"], ref.params[0], rtol=1e-9)
    assert r["right"] > 1.03                                # the fit overshoots 1 ...
    assert "impossible" in r["flags"]                       # ... beyond noise: a flag
    assert "outside [0, 1]" in r["impossible_share"]
    for k in ("share_always", "share_never", "share_compliers"):
        assert np.isnan(r[k]) or 0 <= r[k] <= 1, (k, r[k])
    assert not any("binds for 10" in s for s in r["reasons"])

# ------------------------------------------------------------------ the headline record
def test_headline_is_frozen_and_agrees_with_the_row():
    rng = np.random.default_rng(9)
    x = rng.integers(-60, 60, 20_000).astype(float)
    d = (rng.random(x.size) < 0.2 + 0.5 * (x >= 0) + 0.002 * x).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": d}))
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    h = r["headline"]
    assert (h["estimate"], h["ci_low"], h["ci_high"], h["p_value"], h["q_value"], h["verdict"]) \
        == (r["jump"], r["ci_low"], r["ci_high"], r["p_value"], r["q_value"], r["verdict"])
    assert h["interval"] == "robust" and h["estimate_bc"] == r["jump_bc"]
    assert_allclose((h["ci_low"] + h["ci_high"]) / 2, r["jump_bc"], rtol=1e-12)
    assert h["sample"] == "all rows" and "Calonico" in h["method"]
    assert any(f"bias-corrected jump {r['jump_bc']:+.3f}" in s for s in r["reasons"])
    obj = build_headline(r, 0.05, SERIOUS)
    assert isinstance(obj, Headline)
    with pytest.raises(dataclasses.FrozenInstanceError):
        obj.verdict = "usable"
    out = res.to_dict()["candidates"]
    assert all("headline" in c and "jump_bc" in c for c in out)


def test_discovered_interval_inverts_its_bias_allowing_p_value():
    # Reference: the p-value P(|N(b, 1)| ≥ |t|) of scanner.discover.BiasBound, computed here
    # with scipy.stats.norm; at the interval's end the p-value is exactly alpha.
    row = {"jump": 0.3, "se": 0.04, "bias_bound": 0.05}
    lo, hi = bias_bounded_interval(row)
    t, b = (row["jump"] - lo) / row["se"], row["bias_bound"] / row["se"]
    assert_allclose(sps.norm.sf(t - b) + sps.norm.sf(t + b), 0.05, rtol=1e-9)
    assert_allclose(row["jump"] - lo, hi - row["jump"])
    h = build_headline({**row, "origin": "discovered", "split": True, "q_value": 0.2,
                        "p_value": 0.01, "flags": []}, 0.05, SERIOUS)
    assert h.interval == "bias-bounded" and h.sample == "held-out half"
    assert (h.ci_low, h.ci_high) == (lo, hi)


# ------------------------------------------------------------------ dated rules
def test_dated_rule_headline_uses_in_force_periods_pooled_beside(tmp_path):
    # benchmarks/honest_verdicts.py "dated": jump 0.4 only from 2021-01-01, about half the rows
    # from before, so the pooled jump is near 0.2 (invented data).
    rows, truth = bench.dated(np.random.default_rng(5), tmp_path)
    r = rows[0]
    assert r["in_force"].startswith("2021-01-01") and "in force" in r["headline"]["sample"]
    assert abs(r["jump"] - 0.4) < 3 * r["se"]
    assert abs(r["jump_pooled"] - 0.2) < 0.08
    assert r["ci_low"] <= 0.4 <= r["ci_high"]
    assert r["ci_low_pooled"] is not None and r["ci_high_pooled"] < 0.4
    assert truth == {("d", 0.0): 0.4}


# ------------------------------------------------------------------ the report's words
def test_report_placebo_sentence_and_bias_corrected_column(tmp_path):
    import html as html_lib
    import re
    rng = np.random.default_rng(10)
    x = rng.integers(-60, 60, 20_000).astype(float)
    d = (rng.random(x.size) < 0.2 + 0.5 * (x >= 0) + 0.002 * x).astype(float)
    res = scan(_spec(), data=pd.DataFrame({"x": x, "d": d}))
    res.report(tmp_path / "report.html")
    text = html_lib.unescape(re.sub(r"<[^>]+>", " ", (tmp_path / "report.html").read_text()))
    text = " ".join(text.split())
    # A small placebo p says few placebo jumps are as clear as the real one: the real jump is
    # unusual among them (the empirical p-value of diagnostics/placebo.py).
    assert "a small p means the real jump is unusual among the placebo jumps" in text.lower()
    assert "jumps like this one are common here" not in text
    r = next(r for r in res.rows if r["cutoff"] == 0.0)
    assert "bias-corrected [95% CI]" in text and "jump (conventional)" in text
    assert f"{r['jump_bc']:+.3f} [{r['ci_low']:+.3f}, {r['ci_high']:+.3f}] robust" in text


# ------------------------------------------------------------------ the design-test family
def test_a_strong_rejection_at_one_of_50_contenders_is_not_hidden():
    # 50 contenders (first stage q < alpha); clean density p-values spread over (0.05, 1) and one
    # of 0.004.  Benjamini–Hochberg over the 50 gives it q = 0.2 (no flag): the family hid it.
    # Each contender's own checks (density, balance) form its family: Holm (1979) over two.
    from scanner.score import design_qvalues, flags, holm
    rng = np.random.default_rng(13)
    rows = [{"jump": 0.5, "q_value": 1e-6, "first_stage_f": 400.0, "density_p": float(p),
             "balance_p": float(b), "n_left": 900, "n_right": 900, "distinct_left": 50,
             "distinct_right": 50} for p, b in zip(rng.uniform(0.05, 1, 50), rng.uniform(0.05, 1, 50))]
    rows[17]["density_p"] = 0.004
    design_qvalues(rows, 0.05)
    assert [i for i, r in enumerate(rows) if "sorting" in flags(r, 0.05)] == [17]
    assert rows[17]["density_q"] == pytest.approx(2 * 0.004)
    # Holm against statsmodels' multipletests(method="holm") on the same two p-values.
    from statsmodels.stats.multitest import multipletests
    assert_allclose(holm([0.004, 0.3]), multipletests([0.004, 0.3], method="holm")[1])
    # Not a contender: no flag, whatever the p-value.
    other = {**rows[0], "q_value": 0.5, "density_p": 1e-9}
    design_qvalues([other], 0.05)
    assert other["density_q"] is None and "sorting" not in flags(other, 0.05)


def test_a_bias_correction_far_from_the_estimate_makes_it_unstable():
    # Seen in benchmarks/honest_verdicts.py "both_sides_constant": at a cutoff 20 above a step,
    # the bandwidth selector returned h = 2.1e6 on a 0–299 score, so the window held the step;
    # every sensitivity run agreed (0.549) but the bias-corrected jump was 0.131.
    from scanner.score import flags, stability
    runs = [{"variant": v, "jump": 0.549, "se": 0.0132} for v in ("h×0.5", "h×1", "h×2")]
    row = {"jump": 0.549, "se": 0.0132, "sensitivity": runs, "jump_bc": 0.131,
           "se_robust": 0.015, "first_stage_f": 1740.0, "n_left": 4000, "n_right": 4000,
           "distinct_left": 100, "distinct_right": 100}
    row["stability_z"], row["stability_shift"] = stability(row)
    assert row["stability_z"] > 3 and row["stability_shift"] > 0.2
    assert "unstable" in flags(row, 0.05)
    # A bias correction within noise changes nothing.
    row.update(jump_bc=0.55)
    row["stability_z"], row["stability_shift"] = stability(row)
    assert "unstable" not in flags(row, 0.05)


def test_headline_of_a_discovered_row_whose_bias_cannot_be_bounded():
    # The search step reports no test where the curvature cannot be bounded: the headline must
    # say so, not name a robust interval or "the interval holds both zero and ...".
    from scanner.headline import build_headline
    row = {"origin": "discovered", "split": True, "jump": 0.12, "se": 0.03,
           "bias_bound": float("nan"), "interval": "none", "p_value": float("nan"),
           "q_value": float("nan"), "ci_low": float("nan"), "ci_high": float("nan"),
           "inference_reason": "too few support values on a side to fit a quadratic near the "
           "location: the curvature, so the bias of a searched location, cannot be bounded",
           "flags": []}
    h = build_headline(row, 0.05)
    assert h.interval == "none" and h.verdict == "inconclusive"
    assert h.verdict_reason.startswith("no test: too few support values")
    assert h.method.startswith("no test: too few support values")


def test_every_estimation_module_imports_on_its_own():
    # A fresh interpreter per module: honest and robust import each other, and importing
    # honest first used to fail with a circular ImportError.
    import subprocess
    import sys
    for mod in ("honest", "robust", "batch", "local", "bandwidth"):
        run = subprocess.run([sys.executable, "-c", f"import scanner.estimate.{mod}"],
                             capture_output=True, text=True)
        assert run.returncode == 0, (mod, run.stderr[-500:])
