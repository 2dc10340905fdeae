"""Per-candidate cost of bandwidth selection plus robust interval on 10,000 bins.

Run:  PYTHONPATH=. python benchmarks/bench_inference.py
Prints milliseconds per call (median of repeated runs, wall and CPU); not a timed test.
"""
from __future__ import annotations

import time

import numpy as np

from coverage_designs import to_bins
from scanner.estimate import side_data
from scanner.estimate.inference import inference_fields
from scanner.estimate.robust import honest_interval, curvature_bound, robust_jump
from scanner.estimate.select import select_bandwidth


def _median_ms(fn, reps=30):
    """Median wall and CPU milliseconds (CPU time is steadier on a shared machine)."""
    wall, cpu = [], []
    for _ in range(reps):
        t, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    return 1000 * float(np.median(wall)), 1000 * float(np.median(cpu))


def main():
    rng = np.random.default_rng(0)
    x = np.round(rng.uniform(-1, 1, 200_000) * 5000) / 5000   # 10,001 distinct values = bins
    y = 0.3 + x - x * x + 0.4 * (x >= 0) + rng.normal(0, 0.5, x.size)
    st = to_bins(x, {"y": y})
    d = side_data(st, "y", 0.0)
    print(f"bins: {st.n_bins:,}")
    sel = select_bandwidth(d, "mse")
    for name, fn in (("mse bandwidth (h and b)", lambda: select_bandwidth(d, "mse")),
                     ("cer bandwidth", lambda: select_bandwidth(d, "cer")),
                     ("ik bandwidth", lambda: select_bandwidth(d, "ik")),
                     ("robust interval", lambda: robust_jump(d, sel.h, sel.b)),
                     ("mse bandwidth + robust interval",
                      lambda: robust_jump(d, *(lambda s: (s.h, s.b))(select_bandwidth(d, "mse")))),
                     ("honest interval (incl. M)", lambda: honest_interval(d, sel.h, curvature_bound(d))),
                     ("all inference fields incl. 6 sensitivity runs",
                      lambda: inference_fields(d, sel, "triangular", 1, False))):
        wall, cpu = _median_ms(fn)
        print(f"{name:48s} {wall:8.2f} ms wall {cpu:8.2f} ms CPU")


if __name__ == "__main__":
    main()
