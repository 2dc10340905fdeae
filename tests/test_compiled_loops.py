"""Single compiled loops of the local pass against numpy on the same arrays."""
import numpy as np
import pytest
from numpy.testing import assert_array_equal

from scanner.engines import compiled


@pytest.mark.parametrize("at", [0, 4095, 4096, 8191, 9999])
@pytest.mark.parametrize("bad", [0.5, 2.0, -1.0, np.inf, -np.inf])
def test_zero_one_finds_one_bad_value_anywhere(at, bad):
    # The check is counted block by block (4096 values): a value at either end of a block, or
    # in the short last block, must be found.  Reference: numpy on the same values.
    v = (np.random.default_rng(at).random(10_000) < 0.4) * 1.0
    v[::37] = np.nan
    v[17] = -0.0                                              # -0.0 == 0: allowed
    assert compiled.zero_one(v)
    v[at] = bad
    ref = bool(np.all(np.isnan(v) | (v == 0) | (v == 1)))
    assert compiled.zero_one(v) == ref is False
    assert compiled.zero_one(v[:0])


def test_to_slots_equals_numpy_gather_and_bincount():
    # Each row's group becomes its slot (-1 where the group is out of range: no finite running
    # value), and its 1, x, x² are added to that slot.  Reference: numpy's gather and bincount.
    rng = np.random.default_rng(3)
    G, m = 50, 5000
    group = rng.integers(-1, G + 1, m).astype(np.int32)      # -1 and G: dropped rows
    slot = rng.permutation(80)[:G].astype(np.int64)
    x = rng.normal(size=m)
    M = np.zeros((80, 5))
    M[:, 3:] = 7.0                                            # columns past Σx² are left alone
    live = (group >= 0) & (group < G)
    want = np.where(live, slot[np.clip(group, 0, G - 1)], -1)
    out = group.copy()
    compiled.to_slots(out, slot, x, M)
    assert_array_equal(out, want)
    s = want[live]
    assert_array_equal(M[:, 0], np.bincount(s, minlength=80))
    np.testing.assert_allclose(M[:, 1], np.bincount(s, x[live], minlength=80), rtol=1e-12)
    np.testing.assert_allclose(M[:, 2], np.bincount(s, x[live] ** 2, minlength=80), rtol=1e-12)
    assert (M[:, 3:] == 7.0).all()
