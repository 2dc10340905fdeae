"""How the binning pass uses the machine: threads, kernel and row blocks.

The compiled kernel (numba) folds in up to two threads; ``CUTSCAN_WORKERS`` sets their number,
and the numpy kernels are the fallback where numba cannot be imported.  A batch is folded in
slices small enough for its per-row arrays to stay within ``ADDEND_BUDGET``.  Arrow decodes
the batches into its jemalloc pool while the pass runs (:func:`reading_pool`), and numpy's
large arrays take ordinary pages while it settles its bins (:func:`small_pages`).
"""
from __future__ import annotations

from contextlib import contextmanager
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from .plan import BinPlan

ADDEND_BUDGET = 256 * 2 ** 20   # bytes of a batch's per-row arrays (tracked values, group codes)
MIN_BLOCK = 65_536              # rows: smaller blocks cost more in per-block overhead than memory


def block_rows(plan: "BinPlan") -> int:
    """Rows folded at a time, so a block's tracked values (8 bytes per column) and group codes
    (4 bytes per running variable) stay within ``ADDEND_BUDGET``.  Folding a batch in blocks
    gives the same bins (no result depends on how rows are batched)."""
    width = 8 * len(plan.columns) + 4 * len(plan.running)
    return max(MIN_BLOCK, ADDEND_BUDGET // max(width, 1))


def in_blocks(batches, rows: int | None):
    """Each batch as equal slices of at most ``rows`` rows (zero-copy), in order."""
    for b in batches:
        if rows is None or b.num_rows <= rows:
            yield b
            continue
        parts = -(-b.num_rows // rows)
        size = -(-b.num_rows // parts)
        for at in range(0, b.num_rows, size):
            yield b.slice(at, size)


def _threads() -> int:
    """Threads for the compiled pass: ``CUTSCAN_WORKERS`` if set, else up to 2 (the cores)."""
    import os
    env = os.environ.get("CUTSCAN_WORKERS")
    if env and env.strip().isdigit():
        return max(1, int(env))
    return max(1, min(2, os.cpu_count() or 1))


def _kernel(name: str) -> str:
    """The kernel to run: "compiled" falls back to "sparse" where numba cannot be imported (it
    is a dependency, so only on a broken install)."""
    if name != "compiled":
        return name
    try:
        from . import compiled  # noqa: F401
    except ImportError:
        return "sparse"
    return name


@contextmanager
def reading_pool():
    """Arrow allocates the pass's decoded batches from its jemalloc pool, where it has one.

    Every batch is a fresh set of column buffers of the same sizes.  pyarrow's default pool
    (mimalloc) hands those pages back to the system between batches, and faulting them in again
    cost the 10M-row pass more kernel time than its folding (about 1.6 s against 0.3 s with
    jemalloc on the 2-core machine, per-thread CPU read once from ``/proc``; the pass's wall
    time with and without it: ``benchmarks/bench_scan.py --modes "bin plain" "bin keys"``).  The
    choice holds while the pass runs and the previous pool is restored after it.  A pool the
    user chose through ``ARROW_DEFAULT_MEMORY_POOL`` is left alone, and so is a build without
    jemalloc.
    """
    import os

    import pyarrow as pa
    if os.environ.get("ARROW_DEFAULT_MEMORY_POOL"):
        yield
        return
    try:
        pool = pa.jemalloc_memory_pool()
    except (NotImplementedError, pa.ArrowNotImplementedError):
        yield
        return
    before = pa.default_memory_pool()
    pa.set_memory_pool(pool)
    try:
        yield
    finally:
        pa.set_memory_pool(before)


@contextmanager
def small_pages():
    """numpy's arrays without transparent huge pages while the pass settles its bins.

    numpy asks the kernel for huge pages for every array of 4 MB or more.  Settling a keyed
    pass sorts and regroups some 10^5 slots of each continuous running variable into fresh
    arrays of that size, and on the 2-core virtual machine their huge-page faults made settling
    cost 0.75-1.0 s of CPU in the 10M-row dated pass, against 0.34-0.39 s with ordinary pages
    (per-function timer, four runs each).  The fold, which reads long-lived buffers at random,
    was slower without huge pages, so they are off only here, and the previous setting is
    restored after.  ``NUMPY_MADVISE_HUGEPAGE`` set by the user is left alone, and so is a
    numpy without the switch.
    """
    import os
    try:
        from numpy._core.multiarray import _set_madvise_hugepage as switch
    except ImportError:
        try:
            from numpy.core.multiarray import _set_madvise_hugepage as switch
        except ImportError:
            switch = None
    if switch is None or "NUMPY_MADVISE_HUGEPAGE" in os.environ:
        yield
        return
    before = switch(False)
    try:
        yield
    finally:
        switch(before)
