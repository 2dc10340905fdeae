"""How the binning pass sets the machine up, and that it puts things back."""
import numpy as np
import pandas as pd
import pytest

from scanner.engines import BinPlan, bin_table
from scanner.io import open_table

try:
    from numpy._core.multiarray import _set_madvise_hugepage as switch
except ImportError:                                           # numpy 1.x
    from numpy.core.multiarray import _set_madvise_hugepage as switch


def _now() -> bool:
    """numpy's huge-page setting, read without changing it."""
    was = switch(False)
    switch(was)
    return bool(was)


@pytest.mark.parametrize("user", [None, "1"])
def test_bins_settle_on_ordinary_pages_and_the_setting_comes_back(user, monkeypatch):
    # Settling asks for ordinary pages (huge-page faults on its fresh arrays cost twice the
    # CPU on the machine we measure on), only while it runs; a user's NUMPY_MADVISE_HUGEPAGE
    # is left alone.
    from scanner.engines import accumulate
    rng = np.random.default_rng(2)
    df = pd.DataFrame({"x": rng.normal(size=3000), "d": (rng.random(3000) < 0.5) * 1.0})
    if user is None:
        monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    else:
        monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", user)
    real = accumulate.Accumulator.finish
    seen = []

    def finish(self):
        seen.append(_now())
        return real(self)
    monkeypatch.setattr(accumulate.Accumulator, "finish", finish)
    original = switch(True)
    try:
        bin_table(open_table(df), BinPlan(running=("x",), columns=("d",), treatments=("d",)))
        assert seen == [user is not None]
        assert _now() is True
    finally:
        switch(original)
