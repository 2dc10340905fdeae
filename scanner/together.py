"""Work shared by the candidates of one running variable, done for all of them at once.

Each candidate of a running variable is evaluated on the same bins.  Its bandwidth needs its own
data-driven choice, but once every candidate's bandwidth is known, the covariate balance fits of
all of them — every covariate at every (cutoff, bandwidth) — are one batched computation
(:func:`scanner.diagnostics.balance.covariate_balance_at`, built on
:func:`scanner.estimate.batch.fits_at`): windows, kernel weights and solves as arrays with a row
per candidate, not some thirty small numpy calls per covariate and candidate.
:func:`scanner.scan.evaluate` takes what is prepared here and computes the rest; its rows are
those of the one-by-one path up to the order of floating-point additions (tested).
"""
from __future__ import annotations

from .guards import NUMERIC_FAILURES


def prepare(cands, pooled: dict, spec) -> dict:
    """{position in ``cands``: (bandwidth choice, balance result or None)}.

    The side data each choice was made on are not kept: evaluate rebuilds them (cheaply), where
    holding them for every candidate at once would cost memory in proportion to candidates × bins.

    A candidate whose bandwidth choice fails numerically is left out (evaluate then meets the
    failure itself and reports it on its own row), as is the balance of a running variable whose
    batched fits fail that way.
    """
    from .diagnostics.balance import covariate_balance_at
    from .estimate.local import side_data
    from .estimate.select import select_bandwidth
    from .scan import MIN_DISTINCT
    out, by = {}, {}
    for i, c in enumerate(cands):
        try:
            d = side_data(pooled[c.running], c.treatment, c.cutoff, c.right_closed)
            sel = select_bandwidth(d, spec.bandwidth, spec.kernel, spec.degree, spec.per_side,
                                   MIN_DISTINCT)
        except NUMERIC_FAILURES:
            continue
        out[i] = (sel, None)
        by.setdefault(c.running, []).append(i)
    if not spec.covariates:
        return out
    for running, idx in by.items():
        covs = [v for v in spec.covariates if v != running]
        h = [(out[i][0].h_left + out[i][0].h_right) / 2 for i in idx]
        try:
            bal = covariate_balance_at(pooled[running], covs, [cands[i].cutoff for i in idx], h,
                                       [cands[i].right_closed for i in idx], spec.kernel,
                                       spec.degree)
        except NUMERIC_FAILURES:
            continue
        for i, b in zip(idx, bal):
            out[i] = (out[i][0], b)
    return out

