"""Estimation at a cutoff from BinnedStats: local polynomial jumps, bandwidths, robust and bias-aware intervals."""
from .kernels import KERNELS, kernel
from .local import JumpFit, SideData, fit_fuzzy, fit_jump, side_data
from .bandwidth import ik_bandwidth
# robust re-exports honest, which imports robust's helpers: robust first, so that importing
# scanner.estimate.honest on its own works.
from . import robust  # noqa: E402,F401

__all__ = ["KERNELS", "kernel", "JumpFit", "SideData", "fit_jump", "fit_fuzzy", "side_data",
           "ik_bandwidth", "robust_jump", "robust_fuzzy", "honest_interval", "honest_cv",
           "mse_bandwidth"]
