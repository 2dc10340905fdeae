"""Numbers for people: p- and q-values as the reasons, report, results.md and terminal show them.

Kept apart from scanner.score (which loads the estimators and scipy) so that rendering outputs
from results.json alone starts fast.
"""
from __future__ import annotations

import math


def format_p(p, missing: str = "n/a") -> str:
    """A p- or q-value for people: two significant digits, '< 0.0001' below that floor
    (so an underflowed 0 never reads as certainty), ``missing`` for None or NaN."""
    if p is None or not math.isfinite(p):
        return missing
    return f"{p:.2g}" if p >= 1e-4 else "< 0.0001"


def format_p_eq(name: str, p, missing: str = "n/a") -> str:
    """'p = 0.012', or 'p < 0.0001' for a tiny p (never 'p = < 0.0001')."""
    text = format_p(p, missing)
    return f"{name} {text}" if text.startswith("<") else f"{name} = {text}"


def counted(k: int, noun: str, plural: str | None = None) -> str:
    """'1 search step', '63 search steps' (thousands separated)."""
    return f"{k:,} {noun if k == 1 else (plural or noun + 's')}"
