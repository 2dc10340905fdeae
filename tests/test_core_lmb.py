"""Published empirical result on an open dataset shipped by the `causaldata` package.

Lee, Moretti & Butler (2004, QJE 119(3)), Table I: the effect of a Democratic win at t on the
probability of a Democratic win at t+1 (incumbency) is 0.48 (SE 0.02) [from memory; the
difference in means inside 0.48 < lagdemvoteshare < 0.52 on this table was computed directly
as 0.4843, N = 915 — docs/methods.md §13(a)].
"""
import numpy as np
import pytest

from scanner import scan
from scanner.estimate import fit_jump

from .conftest import binned

causaldata = pytest.importorskip("causaldata")


@pytest.fixture(scope="module")
def lmb():
    from causaldata import close_elections_lmb
    return close_elections_lmb.load_pandas().data


def test_incumbency_jump_uniform_degree0(lmb):
    st = binned(lmb, "lagdemvoteshare", ["democrat"], ["democrat"])
    fit = fit_jump(st, "democrat", 0.5, 0.02, kernel="uniform", degree=0)
    assert abs(fit.jump - 0.48) <= 0.02                  # LMB 2004 Table I (from memory)
    assert fit.n_left + fit.n_right == 915               # direct count on the causaldata table
    # Degree 0 with a uniform kernel is the difference in means inside the window.
    w = lmb[(lmb.lagdemvoteshare > 0.48) & (lmb.lagdemvoteshare < 0.52)]
    diff = (w[w.lagdemvoteshare >= 0.5].democrat.mean() - w[w.lagdemvoteshare < 0.5].democrat.mean())
    np.testing.assert_allclose(fit.jump, diff, rtol=1e-12)


def test_round_number_scan_ranks_one_half_first(lmb):
    spec = {"running": [{"column": "lagdemvoteshare"}], "treatments": {"columns": ["democrat"]},
            "search": {"discover": False}}
    result = scan(spec, data=lmb)
    top = result.rows[0]
    assert top["cutoff"] == 0.5 and top["origin"] == "round"
    assert top["verdict"] != "no jump"
