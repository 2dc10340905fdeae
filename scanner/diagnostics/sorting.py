"""All density (sorting) tests at a cutoff, and the rule that picks the one the design calls for.

Tests run (each a :class:`DensityTest`, all kept in ``density_tests``):

* ``local_polynomial`` — Cattaneo, Jansson & Ma (2020), the default for continuous or finely
  recorded running variables;
* ``mccrary`` — McCrary (2008), a second opinion;
* ``binomial_window`` — counts in a small symmetric window (Cattaneo, Frandsen & Titiunik 2015);
* ``frandsen`` — Frandsen (2017), on exact-support bins only.

Rule for ``density_p`` (the test the design calls for):

1. Exact-support bins with at most ``DISCRETE_MAX`` distinct values (a discrete running variable
   with few support points): Frandsen.
2. Otherwise the local polynomial test; if it cannot be computed, Frandsen on exact support, then
   McCrary, then the binomial window.
3. The binomial window gives NaN where the density is visibly not flat next to the cutoff
   (density_discrete.py): a sloping density is not evidence of sorting, so a candidate can end
   with no density p at all rather than a confident false one.

Heaps: when the running variable has heaps (see heaping.py), every test is also run on the
counts with each heap's excess mass removed (``heaping.deheaped``; keys ending in
``_without_heaps``) and the rule picks from those, so a heaped variable is not called "sorting"
merely because of its heaps (docs/methods.md, Which test is density_p: run the density test with and without heaps).
"""
from __future__ import annotations

import numpy as np

from ..bins import BinnedStats
from .density import mccrary_test
from .density_discrete import frandsen_test, window_count_test
from .density_lp import lp_density_test

DISCRETE_MAX = 30        # common practice: ≤ 30 support points is "few" for a smoothing test


def _run(stats: BinnedStats, cutoff: float, right_closed: bool) -> dict:
    out = {"local_polynomial": lp_density_test(stats, cutoff, right_closed),
           "mccrary": mccrary_test(stats, cutoff, right_closed),
           "binomial_window": window_count_test(stats, cutoff, right_closed)}
    if stats.kind == "exact":
        out["frandsen"] = frandsen_test(stats, cutoff, right_closed)
    return out


def _pick(tests: dict, discrete: bool, suffix: str = ""):
    order = (["frandsen"] if discrete else []) + ["local_polynomial", "frandsen", "mccrary",
                                                  "binomial_window"]
    for name in order:
        t = tests.get(name + suffix)
        if t is not None and np.isfinite(t.p_value):
            return name + suffix, t
    name = order[0] + suffix
    return name, tests.get(name) or tests["local_polynomial" + suffix]


def density_suite(stats: BinnedStats, cutoff: float, right_closed: bool = True,
                  clean: BinnedStats | None = None) -> tuple[str, object, dict]:
    """Run every density test at ``cutoff``; return (chosen name, chosen test, all tests).

    ``clean`` is the de-heaped version of ``stats`` (or None when there are no heaps); the
    tests are then repeated on it and the choice is made among the heap-free versions.
    """
    st = stats.pooled()
    tests = _run(st, cutoff, right_closed)
    discrete = st.kind == "exact" and st.distinct_values() <= DISCRETE_MAX
    suffix = ""
    if clean is not None:
        tests.update({k + "_without_heaps": v for k, v in _run(clean, cutoff, right_closed).items()})
        suffix = "_without_heaps"
    name, chosen = _pick(tests, discrete, suffix)
    return name, chosen, tests
