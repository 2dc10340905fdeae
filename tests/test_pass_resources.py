"""How the binning pass uses the machine: settings it changes and puts back, buffers it reads in place."""
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


def test_running_values_are_read_in_place_only_when_nothing_needs_changing():
    # A float64 running variable with no missing value is read where arrow decoded it (no
    # copy); with a missing value, another type, or rows to be moved, it is converted.
    import pyarrow as pa
    from scanner.engines.batchfold import as_is
    batch = pa.RecordBatch.from_pydict({
        "x": pa.array([1.5, 2.0, 3.25]), "gap": pa.array([1.0, None, 2.0]),
        "i": pa.array([1, 2, 3], pa.int32())})
    x = as_is(batch, "x", None)
    assert x.tolist() == [1.5, 2.0, 3.25] and not x.flags.writeable
    assert np.shares_memory(x, batch.column(0).to_numpy(zero_copy_only=True))
    assert as_is(batch, "gap", None) is None
    assert as_is(batch, "i", None) is None
    assert as_is(batch, "x", np.array([2, 0, 1])) is None
