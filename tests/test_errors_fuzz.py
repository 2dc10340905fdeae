"""A few hundred randomly corrupted CSV, spec and rule-catalogue inputs: only clean exit-2
messages or valid results, never a traceback (the full run is benchmarks/fuzz_inputs.py)."""
import importlib.util
from pathlib import Path

import pytest

FUZZ = Path(__file__).resolve().parents[1] / "benchmarks" / "fuzz_inputs.py"


def load():
    spec = importlib.util.spec_from_file_location("fuzz_inputs", FUZZ)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.mark.parametrize("seed", [11, 12])
def test_corrupted_inputs_give_clean_errors_or_results(seed):
    fuzz = load()
    results = fuzz.run_cases(150, seed)
    problems = [r for r in results if r["problem"]]
    assert problems == [], problems[:5]
    codes = {r["rc"] for r in results}
    assert codes <= {0, 2}
    assert 0 in codes and 2 in codes         # the corruptions reach both outcomes


def test_uncorrupted_inputs_scan_cleanly(tmp_path):
    """The fuzz base case itself is a valid scan (so exit 2 above comes from the corruption)."""
    fuzz = load()
    import numpy as np
    from scanner.cli import main
    (tmp_path / "data.csv").write_text(fuzz.make_data(np.random.default_rng(0)))
    (tmp_path / "spec.toml").write_text(fuzz.SPEC)
    (tmp_path / "rules.toml").write_text(fuzz.RULES)
    assert main(["scan", str(tmp_path / "spec.toml"), "--out", str(tmp_path / "o"), "--quiet"]) == 0
