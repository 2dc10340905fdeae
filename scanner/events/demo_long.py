"""The demo registry in long format: lab results, dispensings and procedures, and enrolment.

Setting (invented, as the one-row-per-visit demo): the Northmere Community Clinics network in
Vallmora keeps a laboratory table (person, date, test, value), a pharmacy and procedure table
(person, date, code) and enrolment periods.  Planted truth:

==========  =================================  ==============================================
score       event within 0–180 days            planted truth
==========  =================================  ==============================================
hba1c (%)   NM-MTF (metformin start)           uptake 0.10 → 0.50 at HbA1c ≥ 6.5 (rule
                                               ``nm-mtf-6.5``); 8 % were on it already
egfr        NM-RENAL (renal clinic referral)    uptake 0.05 → 0.75 below eGFR 30 (sharp-ish)
ldl         NM-STAT (statin start)             smooth in LDL, no threshold
==========  =================================  ==============================================

Extra test codes and event codes (``extra_tests``, ``extra_codes``) are noise: values drawn
from a smooth distribution and events at random days, with no link between them — used by the
registry-wide screen benchmark.  The same data are also written as OMOP CDM v5.4 tables
(``omop/``) with invented concept ids above 2,000,000,000 (the range the standard leaves to
local concepts) for the extra codes; the three named ones use the standard concept ids below,
recalled from the published vocabulary, not checked (from memory).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

START = np.datetime64("2015-01-01")
END_DAYS = 10 * 365                      # enrolment runs within ten years
# Standard OMOP concept ids for the named tests and drugs (from memory, not checked against
# the published vocabulary); local ones for everything invented.
CONCEPTS = {"HBA1C": 3004410, "EGFR": 3049187, "LDL": 3028437,
            "NM-MTF": 1503297, "NM-STAT": 1539403, "NM-RENAL": 2000000101}
LOCAL_BASE = 2_000_000_000

TESTS = {   # test: (mean, sd, decimals, share of persons tested)
    "HBA1C": (6.1, 0.8, 1, 0.8), "EGFR": (62.0, 22.0, 0, 0.7), "LDL": (3.2, 0.9, 1, 0.6),
}


def _draw(rng, n, mean, sd, dec):
    v = rng.normal(mean, sd, n)
    return np.round(np.maximum(v, 0.1 if dec else 1.0), dec)


def generate(n_persons: int = 60_000, seed: int = 11, extra_tests: int = 0, extra_codes: int = 0,
             visits: float = 2.5, noise_events: int | None = None):
    """Measurements, events and enrolment periods (pandas DataFrames) with planted truth.

    ``noise_events``: the exact number of noise events, all inside the ten years (default: a
    number scaled with the event codes, of which those falling outside are dropped).
    """
    rng = np.random.default_rng(seed)
    pid = np.arange(n_persons)
    start = rng.integers(0, 5 * 365, n_persons)
    end = np.minimum(start + rng.integers(365, 8 * 365, n_persons), END_DAYS)
    tests = dict(TESTS)
    for k in range(extra_tests):
        tests[f"LAB{k:03d}"] = (50.0 + k, 10.0, 0, 0.5)
    m_parts, e_parts = [], []
    for t, (mean, sd, dec, share) in tests.items():
        who = pid[rng.random(n_persons) < share]
        reps = 1 + rng.poisson(visits - 1, who.size)
        p = np.repeat(who, reps)
        day = start[p] + (rng.random(p.size) * (end[p] - start[p])).astype(np.int64)
        val = _draw(rng, p.size, mean, sd, dec)
        m_parts.append(pd.DataFrame({"person_id": p, "day": day, "test": t, "value": val}))
        if t in ("HBA1C", "EGFR", "LDL"):
            f = pd.DataFrame({"person_id": p, "day": day, "value": val}).sort_values(
                ["person_id", "day", "value"]).drop_duplicates("person_id")
            x = f["value"].to_numpy()
            if t == "HBA1C":
                prob, code = np.where(x >= 6.5, 0.50, 0.10), "NM-MTF"
            elif t == "EGFR":
                prob, code = np.where(x < 30, 0.75, 0.05), "NM-RENAL"
            else:
                prob, code = 0.05 + 0.25 / (1 + np.exp(-(x - 3.5) / 0.6)), "NM-STAT"
            took = rng.random(x.size) < prob
            e_parts.append(pd.DataFrame({"person_id": f["person_id"].to_numpy()[took],
                                         "day": f["day"].to_numpy()[took] + rng.integers(0, 170, took.sum()),
                                         "code": code}))
            if t == "HBA1C":         # people already on metformin before their first HbA1c
                old = rng.random(x.size) < 0.08
                e_parts.append(pd.DataFrame({"person_id": f["person_id"].to_numpy()[old],
                                             "day": f["day"].to_numpy()[old] - rng.integers(1, 300, old.sum()),
                                             "code": "NM-MTF"}))
    codes = ["NM-MTF", "NM-STAT", "NM-RENAL"] + [f"RX{k:03d}" for k in range(extra_codes)]
    n_noise = int(n_persons * (1 + 0.15 * extra_codes)) if noise_events is None else noise_events
    p = rng.integers(0, n_persons, n_noise)
    if noise_events is None:
        day = start[p] + rng.integers(-200, 3000, n_noise)
    else:   # an exact count: days drawn inside the ten years, so none is dropped below
        lo, hi = np.maximum(start[p] - 200, 0), np.minimum(start[p] + 3000, END_DAYS)
        day = lo + (rng.random(n_noise) * (hi - lo + 1)).astype(np.int64)
    e_parts.append(pd.DataFrame({"person_id": p, "day": day,
                                 "code": rng.choice(codes[3:] or codes, n_noise)}))
    meas = pd.concat(m_parts, ignore_index=True)
    ev = pd.concat(e_parts, ignore_index=True)
    ev = ev[(ev.day >= 0) & (ev.day <= END_DAYS)]
    female = rng.integers(0, 2, n_persons)
    birth = rng.integers(1935, 2000, n_persons)
    persons = pd.DataFrame({"person_id": pid, "female": female, "year_of_birth": birth,
                            "start": start, "end": end})
    return meas, ev.reset_index(drop=True), persons


def _dates(days):
    return START + np.asarray(days).astype("timedelta64[D]")


# The [data] and [events] tables of every spec over the files write_long() writes.
DATA_TABLES = """\
[data]
source = "lab_results.parquet"
person = "person_id"
date = "taken_on"
periods = "enrolment.parquet"
period_start = "enrolled_from"
period_end = "enrolled_to"
"""
EVENTS_TABLE = """\
[events]
source = "dispensing.parquet"
date = "dispensed_on"
code = "code"
"""

SPEC = """\
title = "Northmere lab results and dispensings (long format)"
""" + DATA_TABLES.replace("{", "{{").replace("}", "}}") + """
[[running]]
name = "hba1c"
column = "value"
where = {{ test = "HBA1C" }}
quantity = "hba1c"
unit = "%"

[[running]]
name = "egfr"
column = "value"
where = {{ test = "EGFR" }}
quantity = "egfr"
unit = "mL/min/1.73m2"

[[running]]
name = "ldl"
column = "value"
where = {{ test = "LDL" }}

""" + EVENTS_TABLE + """
[[events.uptake]]
name = "metformin_180d"
codes = ["NM-MTF"]
days = [0, 180]
prior_days = 365

[[events.uptake]]
name = "renal_referral_180d"
codes = ["NM-RENAL"]
days = [0, 180]

[[events.uptake]]
name = "statin_180d"
codes = ["NM-STAT"]
days = [0, 180]

[covariates]
columns = ["female"]

[rules]
catalogues = ["{rules}"]

[search]
discover = {discover}
"""

RULES = """\
# Local rules of the (invented) Northmere Community Clinics network, Vallmora.
[[rule]]
id = "nm-mtf-6.5"
quantity = "hba1c"
unit = "%"
cutoff = 6.5
eligible = "at_or_above"
treatments = ["metformin_180d"]
description = "Start metformin from an HbA1c of 6.5% upwards."
source = "Invented for the cutscan demo (Northmere diabetes pathway, 2019)"

[[rule]]
id = "nm-renal-30-long"
quantity = "egfr"
unit = "mL/min/1.73m2"
cutoff = 30
eligible = "below"
treatments = ["renal_referral_180d"]
description = "Refer to the renal clinic when eGFR falls below 30."
source = "Invented for the cutscan demo (Northmere kidney pathway, 2018)"
"""


def write_long(folder: Path, n_persons: int = 60_000, seed: int = 11, discover: bool = True,
               **kw) -> Path:
    """Write the long-format demo (Parquet) and its spec; return the spec path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    meas, ev, persons = generate(n_persons, seed, **kw)
    female = persons["female"].to_numpy()
    pd.DataFrame({"person_id": meas.person_id.astype(str), "taken_on": _dates(meas.day),
                  "test": meas.test, "value": meas.value,
                  "female": female[meas.person_id.to_numpy()]}).to_parquet(folder / "lab_results.parquet")
    pd.DataFrame({"person_id": ev.person_id.astype(str), "dispensed_on": _dates(ev.day),
                  "code": ev.code}).to_parquet(folder / "dispensing.parquet")
    pd.DataFrame({"person_id": persons.person_id.astype(str), "enrolled_from": _dates(persons.start),
                  "enrolled_to": _dates(persons.end)}).to_parquet(folder / "enrolment.parquet")
    (folder / "long_rules.toml").write_text(RULES)
    spec = folder / "long_spec.toml"
    spec.write_text(SPEC.format(rules="long_rules.toml", discover=str(discover).lower()))
    return spec


def _concept(code: str) -> int:
    if code in CONCEPTS:
        return CONCEPTS[code]
    return LOCAL_BASE + (1000 if code.startswith("RX") else 0) + int(code[-3:])


def write_omop(folder: Path, n_persons: int = 60_000, seed: int = 11, **kw) -> Path:
    """The same registry as OMOP CDM v5.4 tables (Parquet) in ``folder``; returns the folder."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    meas, ev, persons = generate(n_persons, seed, **kw)
    pd.DataFrame({"person_id": persons.person_id, "gender_concept_id": np.where(persons.female == 1, 8532, 8507),
                  "year_of_birth": persons.year_of_birth, "month_of_birth": 6}).to_parquet(folder / "person.parquet")
    pd.DataFrame({"measurement_id": np.arange(len(meas)), "person_id": meas.person_id,
                  "measurement_concept_id": [_concept(t) for t in meas.test] if len(meas) < 2_000_000
                  else meas.test.map(lambda t: _concept(t)),
                  "measurement_date": _dates(meas.day), "value_as_number": meas.value}
                 ).to_parquet(folder / "measurement.parquet")
    is_proc = ev.code.isin(["NM-RENAL"]).to_numpy()
    drugs, procs = ev[~is_proc], ev[is_proc]
    pd.DataFrame({"drug_exposure_id": np.arange(len(drugs)), "person_id": drugs.person_id,
                  "drug_concept_id": drugs.code.map(_concept).astype(np.int64),
                  "drug_exposure_start_date": _dates(drugs.day)}).to_parquet(folder / "drug_exposure.parquet")
    pd.DataFrame({"procedure_occurrence_id": np.arange(len(procs)), "person_id": procs.person_id,
                  "procedure_concept_id": procs.code.map(_concept).astype(np.int64),
                  "procedure_date": _dates(procs.day)}).to_parquet(folder / "procedure_occurrence.parquet")
    pd.DataFrame({"observation_period_id": persons.person_id, "person_id": persons.person_id,
                  "observation_period_start_date": _dates(persons.start),
                  "observation_period_end_date": _dates(persons.end)}).to_parquet(folder / "observation_period.parquet")
    # A local ingredient-level concept whose only descendant is the metformin product concept:
    # uptake of the parent counts the child through concept_ancestor.
    pd.DataFrame({"ancestor_concept_id": [LOCAL_BASE + 9000, CONCEPTS["NM-MTF"]],
                  "descendant_concept_id": [CONCEPTS["NM-MTF"], CONCEPTS["NM-MTF"]],
                  "min_levels_of_separation": [1, 0], "max_levels_of_separation": [1, 0]}
                 ).to_parquet(folder / "concept_ancestor.parquet")
    return folder
