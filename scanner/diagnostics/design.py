"""Per-candidate design checks for scan.evaluate(): density, heaping/donut, placebo, compliance,
power and (only on request) outcome effects.  Pure functions of BinnedStats; results as flat
row fields (documented in score.py and docs/output.md)."""
from __future__ import annotations

import numpy as np

from ..estimate.local import fit_fuzzy, fit_jump, side_data
from .compliance import compliance_profile
from .heaping import deheaped, donut_changes, donut_fit, heap_near, heap_tests, heap_values
from .placebo import placebo_test
from .power import outcome_power
from .sorting import density_suite


def _heaps(stats, running, cache):
    key = ("heaps", running)
    if key not in cache:
        tests = heap_tests(stats)
        values = heap_values(tests)
        cache[key] = (tests, values, deheaped(stats, tests) if values.size else None)
    return cache[key]


def design_checks(stats, cand, spec, fit, data, cache: dict, binary: bool | None = None,
                  raw=None) -> dict:
    """Everything after the first stage and covariate balance, as row fields.

    ``binary`` (the raw data's ``Variation.binary``) says whether the treatment is 0/1; ``data``
    may be variance-floored, which hides that.  ``raw`` is the side data before the floor: the
    placebo check needs it to see that uptake is constant around a placebo point (a floored
    side looks spread out, and its placebos would count as finding nothing).  The real jump's
    z comes from the floored data, so where a side varies a little a raw placebo can show a
    larger z than the floored real one: that errs only towards a larger placebo p (more
    caution), never towards a confident "usable".
    """
    c, h, rc = cand.cutoff, fit.bandwidth, cand.right_closed
    row = {}
    tests, values, clean = _heaps(stats, cand.running, cache)
    # Density: one suite per (running variable, cutoff), shared by all treatments.
    dkey = ("density", cand.running, c, rc)
    if dkey not in cache:
        cache[dkey] = density_suite(stats, c, rc, clean)
    name, dens, alltests = cache[dkey]
    row.update(density_p=dens.p_value, density_theta=dens.theta, density_ratio=dens.ratio,
               density_method=name, density_reason=dens.reason,
               density_tests={k: v.to_dict() for k, v in alltests.items()})
    # Heaping near the line, and the donut re-estimate without heaped values in the window.
    heap = heap_near(tests, c, h / 2 if np.isfinite(h) else 0.0)
    row.update(heap_p=heap.p_value if heap else None, heap_ratio=heap.ratio if heap else None,
               heap_value=heap.value if heap else None, heap_near=bool(heap and heap.is_heap),
               heap_values=[float(v) for v in values[:50]],
               donut_jump=None, donut_se=None, donut_p=None, donut_changes=False)
    inside = values[np.abs(values - c) < h] if np.isfinite(h) and values.size else values[:0]
    if inside.size and np.isfinite(fit.jump):
        dn = donut_fit(stats, cand.treatment, c, h, inside, spec.kernel, spec.degree, rc)
        row.update(donut_jump=dn.jump, donut_se=dn.se, donut_p=dn.p_value,
                   donut_changes=donut_changes(fit, dn, spec.alpha), donut_reason=dn.reason)
    # Placebo cutoffs on each side, using only that side's data.
    pl = placebo_test(stats, data if raw is None else raw, c, h, fit.z, spec.kernel,
                      spec.degree)
    row.update(placebo_p=pl.p_value, placebo_n=pl.n_placebos, placebo_exceed=pl.exceed,
               placebo_reason=pl.reason)
    # Compliance profile from the one-sided uptake limits.
    cp = compliance_profile(stats, data, fit, cand.eligible_side, spec.kernel, spec.degree, rc,
                            binary=binary)
    row.update(share_always=cp.share_always, share_never=cp.share_never,
               share_compliers=cp.share_compliers, share_always_se=cp.se_always,
               share_never_se=cp.se_never, share_compliers_se=cp.se_compliers,
               eligible_limit_side=cp.eligible, compliance_reason=cp.reason,
               impossible_share=cp.impossible)
    # Power for planned outcomes (never uses an outcome's jump).
    row["power"] = [outcome_power(side_data(stats, y, c, rc), h, fit.jump, spec.alpha,
                                  spec.kernel, spec.degree, name=y)
                    for y in spec.outcomes]
    if spec.effects and np.isfinite(fit.jump):
        row["outcome_effects"] = [_effect(stats, cand, spec, y, h) for y in spec.outcomes]
    return row


def _effect(stats, cand, spec, y, h) -> dict:
    """Outcome effects, computed only behind ``[outcomes] effects = true`` and labelled so."""
    rc = cand.right_closed
    itt = fit_jump(stats, y, cand.cutoff, h, spec.kernel, spec.degree, rc)
    out = {"outcome": y, "label": "outcome effect (requested: [outcomes] effects = true)",
           "itt": itt.jump, "itt_se": itt.se, "itt_p": itt.p_value, "complier_effect": None,
           "complier_se": None, "complier_p": None}
    if (cand.treatment, y) in stats.pairs:
        fz = fit_fuzzy(stats, cand.treatment, y, cand.cutoff, h, spec.kernel, spec.degree, rc)
        out.update(complier_effect=fz.effect, complier_se=fz.se, complier_p=fz.p_value)
    return out
