"""Estimation at a cutoff from BinnedStats: local polynomial jumps and bandwidth selectors."""
from .kernels import KERNELS, kernel
from .local import JumpFit, SideData, fit_fuzzy, fit_jump, side_data
from .bandwidth import ik_bandwidth

__all__ = ["KERNELS", "kernel", "JumpFit", "SideData", "fit_jump", "fit_fuzzy", "side_data",
           "ik_bandwidth"]
