"""Covariate balance at a cutoff: the same local polynomial jump for each pre-determined covariate.

Each covariate's jump is estimated with the candidate's kernel and bandwidth and standardised by
the covariate's standard deviation near the cutoff.  The joint p-value is the Bonferroni-adjusted
minimum (K · min p, capped at 1), which is valid whatever the dependence between covariates
(Bonferroni; Holm 1979 gives the same value for the smallest p).

Why not a joint Wald test: the χ²_K statistic τ̂'V̂⁻¹τ̂ needs the covariances of the K covariate
jumps, Σ ℓ_i² e_a,i e_b,i, i.e. per-bin cross sums Σ a·b of every covariate pair, which
BinnedStats holds only for the (treatment, outcome) pairs the plan asks for.  Adding K(K−1)/2
pairs to the binning pass is possible (``BinPlan.pairs``) but changes the engine contract; until
then the max-type Bonferroni test is the valid choice.  It is also the more powerful one when a
single covariate shifts, the usual pattern when one pre-determined trait is sorted on.
Simes' test would be sharper but is only guaranteed under positive dependence, which two-sided
tests of correlated covariates do not ensure.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..bins import BinnedStats
from ..estimate.local import fit_jumps, side_data_many


@dataclass(frozen=True)
class BalanceResult:
    """Per-covariate standardised jumps and the joint p-value."""

    p_value: float
    covariates: list = field(default_factory=list)   # dicts: name, jump, se, std_jump, p_value
    method: str = "bonferroni"

    def worst(self):
        ok = [c for c in self.covariates if np.isfinite(c["p_value"])]
        return min(ok, key=lambda c: c["p_value"]) if ok else None


def covariate_balance(stats: BinnedStats, covariates, cutoff: float, bandwidth: float,
                      kernel: str = "triangular", degree: int = 1,
                      right_closed: bool = True) -> BalanceResult:
    """Jumps of each covariate at ``cutoff`` and a Bonferroni joint p-value.

    Covariates present on the same rows share one weighted design and are fitted in one solve
    (``estimate.local.fit_jumps``); the numbers are those of one fit per covariate.
    """
    found = {}
    for names, d in side_data_many(stats, covariates, cutoff, right_closed):
        win = np.abs(d.u) < bandwidth
        nn = d.n[win].sum()
        for j, (cov, fit) in enumerate(zip(names, fit_jumps(d, cutoff, bandwidth, kernel, degree))):
            found[cov] = _entry(cov, fit, nn, d.s1[win, j].sum(), d.s2[win, j].sum())
    return _result([found[cov] for cov in covariates])


def covariate_balance_at(stats: BinnedStats, covariates, cutoffs, bandwidths, right_closed,
                         kernel: str = "triangular", degree: int = 1) -> list[BalanceResult]:
    """:func:`covariate_balance` at many (cutoff, bandwidth, right_closed) of one running
    variable, the fits of all of them computed together (``estimate.batch.fits_at``); the
    numbers are those of one call per point up to the order of floating-point additions."""
    from ..estimate.batch import fits_at
    st = stats.pooled()
    c = np.asarray(cutoffs, float)
    h = np.asarray(bandwidths, float)
    fits = fits_at(st, covariates, c, h, right_closed, kernel, degree)
    win = np.abs(st.x[None, :] - c[:, None]) < h[:, None]       # points × bins
    idx = [st.col(cov) for cov in covariates]
    nn = win @ st.cnt[:, idx].astype(float)                     # points × covariates
    s1, s2 = win @ st.s1[:, idx], win @ st.s2[:, idx]
    return [_result([_entry(cov, f, nn[i, j], s1[i, j], s2[i, j])
                     for j, (cov, f) in enumerate(zip(covariates, row))])
            for i, row in enumerate(fits)]


def _entry(cov: str, fit, nn: float, s1: float, s2: float) -> dict:
    """One covariate's jump, standardised by its standard deviation in the window (``nn``
    rows with sums ``s1``, ``s2``)."""
    sd = np.sqrt(max(s2 / nn - (s1 / nn) ** 2, 0.0)) if nn > 1 else np.nan
    std = fit.jump / sd if sd and sd > 0 else float("nan")
    return {"name": cov, "jump": fit.jump, "se": fit.se, "std_jump": float(std),
            "std_ci_low": float(fit.ci_low / sd) if sd and sd > 0 else float("nan"),
            "std_ci_high": float(fit.ci_high / sd) if sd and sd > 0 else float("nan"),
            "p_value": fit.p_value, "reason": fit.reason}


def _result(rows: list) -> BalanceResult:
    """Bonferroni joint p-value over the covariates with a test."""
    ps = [r["p_value"] for r in rows if np.isfinite(r["p_value"])]
    joint = min(1.0, len(ps) * min(ps)) if ps else float("nan")
    return BalanceResult(float(joint), rows)
