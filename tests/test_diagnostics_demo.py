"""Each design flag appears in the demo where its mechanism is planted and nowhere else.

Planted truth: scanner/demo.py's module docstring (invented Vallmora/Northmere data).
"""
import numpy as np
import pytest

from scanner import scan
from scanner.demo import write_inputs


@pytest.fixture(scope="module")
def demo_rows(tmp_path_factory):
    spec = write_inputs(tmp_path_factory.mktemp("demo"))
    return scan(spec).rows


def _where(rows, flag):
    return {(r["running"], r["cutoff"]) for r in rows if flag in r["flags"]}


PLANTED_RULES = {("egfr", 30.0), ("hba1c", 6.5), ("sbp", 140.0), ("sbp", 150.0), ("phq9", 10.0)}


def _chance_flags_allowed(rows, got):
    """Each contender's design checks are their own family (score.design_qvalues): a clean
    design is flagged with chance at most alpha, so about alpha × contenders chance flags are
    expected.  Allow that many (binomial 99.9% bound, scipy), never on a planted rule."""
    from scipy import stats
    contenders = sum(1 for r in rows if r["q_value"] is not None and r["q_value"] < 0.05)
    assert not (got & PLANTED_RULES), got
    assert len(got) <= stats.binom.ppf(0.999, contenders, 0.05), (got, contenders)


def test_sorting_only_at_the_income_waiver(demo_rows):
    # Planted: a third of incomes in (24, 27] are reported in (23, 24], so the density is
    # disturbed from 23 to 27 — a cutoff inside that stretch is rightly flagged too.
    got = _where(demo_rows, "sorting")
    assert ("income_k", 24.0) in got
    _chance_flags_allowed(demo_rows, {(r, c) for r, c in got
                                      if not (r == "income_k" and 23.0 <= c <= 27.0)})


def test_heaping_only_on_the_heaped_walking_minutes(demo_rows):
    got = _where(demo_rows, "heaping")
    assert got and {r for r, _ in got} == {"walk_minutes"}
    walk = [r for r in demo_rows if r["running"] == "walk_minutes"]
    assert not any(r["verdict"] == "usable" for r in walk)


def test_coarse_only_on_the_mobility_grade(demo_rows):
    # Planted: the five-value grade.  Elsewhere "coarse" may only appear where the support itself
    # ends (a round cutoff within five values of the lowest or highest score, e.g. PHQ-9 at 2).
    coarse = [r for r in demo_rows if "coarse" in r["flags"]]
    assert "mobility_grade" in {r["running"] for r in coarse}
    for r in coarse:
        if r["running"] != "mobility_grade":
            # Not a clear jump: "no jump", or "inconclusive" where the (bias-aware) interval
            # of a coarse score still holds a practical jump.
            assert r["verdict"] in ("no jump", "inconclusive") \
                and min(r["distinct_left"], r["distinct_right"]) < 5, r


def test_no_imbalance_where_none_is_planted(demo_rows):
    _chance_flags_allowed(demo_rows, _where(demo_rows, "imbalance"))


def test_declared_rules_carry_compliance_and_power(demo_rows):
    top = {(r["running"], r["treatment"]): r for r in demo_rows if r["origin"] == "declared"}
    renal = top[("egfr", "renal_referral")]
    assert renal["verdict"] == "usable" and renal["share_compliers"] == pytest.approx(1.0, abs=1e-9)
    edu = top[("hba1c", "diabetes_education")]
    # planted: uptake 0.12 -> 0.57, so about 45% compliers, 12% always-takers, 43% never-takers
    assert abs(edu["share_compliers"] - 0.45) < 3 * edu["share_compliers_se"]
    assert abs(edu["share_always"] - 0.12) < 3 * edu["share_always_se"] + 0.01
    pw = edu["power"][0]
    assert pw["outcome"] == "admitted_12m" and np.isfinite(pw["mde_itt"])
    assert pw["mde_complier"] == pytest.approx(pw["mde_itt"] / abs(edu["jump"]))
    assert "outcome_effects" not in edu            # effects only behind [outcomes] effects = true
    assert any("threshold binds for" in s for s in edu["reasons"])
