import numpy as np
import pandas as pd
import pytest

from scanner.engines import BinPlan, bin_table
from scanner.io import open_table


def binned(df, running, columns, treatments=(), pairs=(), **kw):
    """BinnedStats of ``running`` from a DataFrame through the local engine."""
    plan = BinPlan((running,), tuple(columns), tuple(treatments), tuple(pairs), **kw)
    return bin_table(open_table(df), plan).stats[running]


@pytest.fixture
def integer_design():
    """Simulated fuzzy design on an integer running variable (invented data, for equivalence tests)."""
    rng = np.random.default_rng(11)
    n = 6000
    x = rng.integers(-40, 41, n).astype(float)
    d = (rng.random(n) < 0.15 + 0.5 * (x >= 0) + 0.003 * x).astype(float)
    y = 1 + 0.02 * x - 0.0004 * x ** 2 + 0.7 * d + rng.normal(0, 1 + 0.01 * np.abs(x), n)
    return pd.DataFrame({"x": x, "d": d, "y": y})


ROOT = __import__("pathlib").Path(__file__).resolve().parents[1]


def run_cli(*args, cwd=None, timeout=600):
    """Run the real command (``python -m scanner``) and return the CompletedProcess."""
    import os
    import subprocess
    import sys
    env = dict(os.environ, PYTHONPATH=str(ROOT), COLUMNS="160")
    return subprocess.run([sys.executable, "-m", "scanner", *map(str, args)], cwd=cwd or ROOT,
                          env=env, capture_output=True, text=True, timeout=timeout)
