"""Kernels on [-1, 1], looked up by name."""
from __future__ import annotations

import numpy as np


def triangular(u):
    return np.where(np.abs(u) < 1, 1.0 - np.abs(u), 0.0)


def epanechnikov(u):
    return np.where(np.abs(u) < 1, 0.75 * (1.0 - u * u), 0.0)


def uniform(u):
    # Strict inequality so that a window "c - h < x < c + h" is the support for every kernel.
    return np.where(np.abs(u) < 1, 0.5, 0.0)


KERNELS = {"triangular": triangular, "epanechnikov": epanechnikov, "uniform": uniform}


def kernel(name: str):
    """Return the kernel function called ``name``; an unknown name lists the valid ones."""
    try:
        return KERNELS[name]
    except KeyError:
        from ..errors import InputError
        raise InputError(f"kernel '{name}' is unknown; choose one of {', '.join(KERNELS)}.") from None
