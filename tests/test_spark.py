"""The Spark engine gives the local engine's BinnedStats and results (local[2] session)."""
import importlib.util
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from scanner.engines import BinPlan, bin_table
from scanner.errors import InputError
from scanner.io import open_table

from .test_engines import PLAN, assert_same_stats, small_table

HAVE_PYSPARK = importlib.util.find_spec("pyspark") is not None


def _java_missing():
    import os
    home = os.environ.get("JAVA_HOME")
    return not ((home and shutil.which("java", path=os.path.join(home, "bin"))) or shutil.which("java"))


needs_spark = pytest.mark.skipif(
    not HAVE_PYSPARK or _java_missing(),
    reason="Spark tests need pyspark (make test installs it) and Java 17+ on PATH or JAVA_HOME")


@pytest.fixture(scope="module")
def spark():
    from scanner.engines.spark import local_session
    session = local_session("local[2]")
    yield session
    session.stop()


def frame():
    df = small_table(1500, seed=21)
    rng = np.random.default_rng(2)
    df["d"] = (rng.random(len(df)) < 0.2 + 0.5 * (df.age >= 60)).astype(float)
    return df


@needs_spark
@pytest.mark.spark
def test_spark_bins_equal_local_bins(spark):
    df = frame()
    # Spark jobs are slow to start, so two running variables cover the two non-exact paths.
    # Forced edges off the grid split bins in both engines (declared cutoffs, one left-closed).
    plan = BinPlan(**{**PLAN, "running": ("cont", "lab")}, date="visit", bin_width={"lab": 0.5},
                   edges={"cont": ((41.37, True),), "lab": ((6.3, True), (7.2, False))},
                   periods={"lab": "year"})
    local = bin_table(open_table(df), plan)
    remote = bin_table(spark.createDataFrame(df), plan, engine="spark")
    assert remote.rows_read == local.rows_read
    assert remote.missing == local.missing and remote.nonfinite == local.nonfinite
    # power-of-ten grid past fine_keys (cont) and a user width (lab); exact support is
    # covered by the scan test below
    assert [local.stats[r].kind for r in plan.running] == ["width", "width"]
    for r in plan.running:
        assert_same_stats(remote.stats[r], local.stats[r])
        assert (local.stats[r].key % 1 != 0).any()        # some bin was split
        assert not local.stats[r].straddles(6.3 if r == "lab" else 41.37)


@needs_spark
@pytest.mark.spark
def test_spark_scan_results_equal_local(spark, tmp_path):
    import scanner
    df = frame().drop(columns="visit")
    # No held-out split: a Spark DataFrame has no row positions for it (scan() says so in a note).
    spec = {"running": [{"column": "age"}, {"column": "cont"}], "treatments": {"columns": ["d"]},
            "covariates": {"columns": ["z"]}, "search": {"confirm": False}}
    local = scanner.scan(spec, df).rows
    remote = scanner.scan(spec, spark.createDataFrame(df)).rows
    path = tmp_path / "t.parquet"
    df.to_parquet(path)
    from_file = scanner.scan({**spec, "data": {"source": str(path), "engine": "spark"}}).rows
    assert len(local) == len(remote) == len(from_file) > 0
    for other in (remote, from_file):
        for a, b in zip(local, other):
            for k, v in a.items():
                if isinstance(v, float):
                    assert_allclose(b[k], v, rtol=1e-9, atol=1e-12, err_msg=k)
                elif not isinstance(v, (list, dict)):
                    assert b[k] == v, k


@needs_spark
@pytest.mark.spark
def test_spark_refuses_non_binary_treatment(spark):
    df = pd.DataFrame({"x": np.arange(40.0), "d": np.r_[np.zeros(39), 2.0]})
    with pytest.raises(InputError, match="treatment column 'd' must be 0/1.*values seen:.*2"):
        bin_table(spark.createDataFrame(df), BinPlan(("x",), ("d",), ("d",)), engine="spark")


def test_missing_java_is_a_clear_error(monkeypatch):
    from scanner.engines.spark import require_java
    monkeypatch.setenv("JAVA_HOME", "/nonexistent")
    monkeypatch.setenv("PATH", "/nonexistent")
    with pytest.raises(InputError, match="Spark engine needs Java .17 or newer. and none was found"):
        require_java()
