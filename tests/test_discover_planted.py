"""Fast version of benchmarks/bench_discover_planted.py (planted jumps of 0.15)."""
from benchmarks.discover_sim import PLANTED, planted_rep


def test_planted_jumps_found_confirmed_and_placed():
    # Fast version of benchmarks/bench_discover_planted.py (jump 0.15, n = 50,000).
    res = [planted_rep(r) for r in range(2)]
    cells = [rep[name] for rep in res for name in PLANTED]
    assert sum(c["found"] for c in cells) >= len(cells) - 1
    assert sum(c["found"] and c["error"] <= c["h"] / 4 for c in cells) >= len(cells) - 2
    assert sum(c["false"] for c in cells) == 0
