"""The Python API accepts any pandas DataFrame, a pyarrow Table or Dataset (hypothesis).

Property: whatever the dtypes that hold the values — NumPy, nullable (Int64, Float64, boolean),
categorical, pyarrow-backed, text — ``scanner.scan(spec, data=frame)`` bins exactly what the
plain float64 frame gives (counts equal, sums to 1e-12).  The reference is the float frame
through the same engine (tests/conftest.binned).  Invented data.
"""
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from scanner.scan import scan
from tests.conftest import binned

SPEC = {"running": [{"column": "x"}], "treatments": {"columns": ["d"]},
        "covariates": {"columns": ["y"]},
        "search": {"round_numbers": False, "discover": False}}


def _x_as(kind, x):
    miss = np.isnan(x)
    if kind == "float64":
        return pd.Series(x)
    if kind == "Float64":
        return pd.Series(x, dtype="Float64")
    if kind == "Int64":          # x is integral for this kind
        return pd.Series(pd.array([None if m else int(v) for v, m in zip(x, miss)], dtype="Int64"))
    if kind == "arrow_double":
        return pd.Series(pd.array(x, dtype="double[pyarrow]"))
    if kind == "arrow_text_chunked":
        text = [None if m else repr(float(v)) for v, m in zip(x, miss)]
        k = len(text) // 2
        arr = pa.chunked_array([pa.array(text[:k], pa.large_string()),
                                pa.array(text[k:], pa.large_string())])
        return pd.Series(pd.arrays.ArrowExtensionArray(arr))
    if kind == "str":
        return pd.Series([None if m else repr(float(v)) for v, m in zip(x, miss)], dtype="str")
    if kind == "object_text":
        return pd.Series([None if m else f" {float(v)!r} " for v, m in zip(x, miss)], dtype=object)
    if kind == "categorical":
        return pd.Series(pd.Categorical(x))
    raise AssertionError(kind)


def _d_as(kind, d):
    if kind == "int8":
        return pd.Series(d.astype(np.int8))
    if kind == "bool":
        return pd.Series(d.astype(bool))
    if kind == "boolean":
        return pd.Series(pd.array(d.astype(bool), dtype="boolean"))
    if kind == "arrow_bool":
        return pd.Series(pd.array(d.astype(bool), dtype="bool[pyarrow]"))
    if kind == "yes_no_categorical":
        return pd.Series(pd.Categorical(np.where(d == 1, "yes", "no")))
    if kind == "text_01":
        return pd.Series(np.where(d == 1, "1", "0"), dtype="string[pyarrow]")
    raise AssertionError(kind)


X_KINDS = ["float64", "Float64", "Int64", "arrow_double", "arrow_text_chunked", "str",
           "object_text", "categorical"]
D_KINDS = ["int8", "bool", "boolean", "arrow_bool", "yes_no_categorical", "text_01"]


@st.composite
def frames(draw):
    n = draw(st.integers(30, 300))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    xk, dk = draw(st.sampled_from(X_KINDS)), draw(st.sampled_from(D_KINDS))
    if xk == "Int64" or draw(st.booleans()):
        x = rng.integers(-20, 21, n).astype(float)
    else:
        x = np.round(rng.normal(0, 8, n), draw(st.integers(0, 2)))
    if draw(st.booleans()) and xk != "categorical":
        x[rng.random(n) < 0.1] = np.nan
    d = (rng.random(n) < 0.3 + 0.4 * (np.nan_to_num(x) >= 0)).astype(float)
    y = np.round(rng.normal(50, 10, n), 2)
    messy = pd.DataFrame({"x": _x_as(xk, x), "d": _d_as(dk, d), "y": pd.Series(y, dtype="Float64"),
                          "id": pd.Series([f"P{i}" for i in range(n)], dtype="string[pyarrow]")})
    return pd.DataFrame({"x": x, "d": d, "y": y}), messy, draw(st.sampled_from(["pandas", "table", "dataset"]))


@settings(max_examples=220, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(frames())
def test_any_frame_bins_as_its_float_values(case):
    ref, messy, form = case
    data = messy
    if form != "pandas":
        data = pa.Table.from_pandas(messy, preserve_index=False)
        if form == "dataset":
            data = ds.dataset(data)
    want = binned(ref, "x", ("d", "y"), ("d",))
    got = scan(SPEC, data=data).stats["x"]
    assert_array_equal(got.key, want.key)
    assert_array_equal(got.n, want.n)
    assert_array_equal(got.cnt, want.cnt)
    assert_allclose(got.s1, want.s1, rtol=1e-12)


def test_chunked_arrow_text_beyond_120k_rows():
    """A pyarrow-backed text column whose Arrow data come in chunks (as read_parquet gives for
    large files) is read as one column; the former crash was 'Cannot convert ChunkedArray'."""
    n = 130_000
    rng = np.random.default_rng(2)
    x = rng.integers(0, 100, n).astype(float)
    text = [f"{v:g}" for v in x]
    chunks = pa.chunked_array([pa.array(text[i:i + 40_000], pa.large_string())
                               for i in range(0, n, 40_000)])
    d = (rng.random(n) < 0.2 + 0.5 * (x >= 50)).astype(float)
    df = pd.DataFrame({"x": pd.Series(pd.arrays.ArrowExtensionArray(chunks)), "d": d,
                       "y": rng.normal(size=n),
                       "who": pd.Series(pd.arrays.ArrowExtensionArray(chunks))})
    got = scan(SPEC, data=df).stats["x"]
    want = binned(pd.DataFrame({"x": x, "d": d, "y": df.y}), "x", ("d", "y"), ("d",))
    assert_array_equal(got.n, want.n)
    assert_allclose(got.s1, want.s1, rtol=1e-12)


def test_unreadable_object_column_names_the_column():
    from scanner.errors import InputError
    df = pd.DataFrame({"x": np.arange(40.0), "d": np.arange(40) % 2, "y": [object()] * 40})
    with pytest.raises(InputError, match="covariate column 'y' holds text that is not a number"):
        scan(SPEC, data=df)
