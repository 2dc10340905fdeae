"""Fast versions of the discovery simulations (full versions: benchmarks/bench_discover_*.py)."""
import numpy as np
import pytest

from benchmarks.discover_sim import SHAPES, binned, null_rep, smooth_uptakes
from scanner.breaks import search_pair


def _search_rate(shape, treatment, reps, n=20_000):
    hits = 0
    for r in range(reps):
        rng = np.random.default_rng(77 + r)
        x = SHAPES[shape][0](rng, n)
        st = binned(shape, x, {treatment: smooth_uptakes(shape, x)[treatment]}, rng,
                    split=False, bins=400)
        hits += search_pair(st, treatment, seed=r, draws=500).search_p < 0.05
    return hits / reps


@pytest.mark.parametrize("shape,treatment", [("normal", "t_logistic"), ("lognormal", "t_linear")])
def test_search_size_on_smooth_uptake(shape, treatment):
    # Size of the sup-|t| test with simulated critical values (Porter & Yu 2015 design idea):
    # nominal 0.05; 20 replications, P(rate > 0.2) ≈ 0.003 at the nominal size (binomial).
    assert _search_rate(shape, treatment, 20) <= 0.2


def test_null_registry_has_no_confirmed_discovery():
    # Fast version of benchmarks/bench_discover_null.py: 6 shapes (coarse ones included),
    # 3 smooth uptakes, one replication; the full run reports the share over 200.
    shapes = ["uniform", "lognormal", "age", "binom30", "round01", "mixture"]
    res = null_rep(3, n=40_000, shapes=shapes)
    assert res["confirmed"] == 0
    assert res["pairs"] == 18 and res["grid_points"] > 1500
