"""Synthetic registry for ``cutscan demo``: an invented setting with planted truth.

Setting (invented): the Northmere Community Clinics network in the region of Vallmora records one
row per patient visit.  Each running variable below carries one planted mechanism, so a reader
can check the ranking by eye (examples/README.md lists them):

=================  ===================  ===========================================================
running variable   treatment            planted truth
=================  ===================  ===========================================================
egfr               renal_referral       sharp declared rule: referral iff eGFR < 30
hba1c              diabetes_education   fuzzy declared rule: uptake 0.12 → 0.57 at HbA1c ≥ 6.5 %
frailty            home_nurse           undeclared, non-round threshold at 0.37 (uptake +0.35)
income_k           fee_waiver           declared waiver for income ≤ 24.0 thousand, with sorting:
                                        a third of people just above report just below
walk_minutes       exercise_programme   self-reported and heaped at multiples of 10; rounders take
                                        up the programme more often (no real threshold)
mobility_grade     physio_referral      coarse 1–5 grade; referral jumps at grade ≥ 4
bmi                dietitian_referral   smooth logistic uptake, no jump
wait_days          (none)               pure noise
phq9               talk_therapy         declared rule with an effective date: referral from a PHQ-9
                                        score of 10 only from 2020-10-01 (+0.30 after, no jump
                                        before; rule ``vm-mind-phq9-10``)
sbp                bp_medication        declared rule whose value changed: medication from systolic
                                        150 mmHg until 2021-06-30, from 140 mmHg from 2021-07-01
                                        (+0.45 at the line in force; rules ``nm-bp-start-150`` →
                                        ``nm-bp-start-140``, group ``nm-bp-start``)
=================  ===================  ===========================================================

The last two running variables are drawn from their own random stream (seeded from ``seed``),
so the columns above them are the same as before they were added; in the spec they are tested
against their own treatments only, and the older running variables against the older
treatments only.  ``cutscan check spec.toml --rule vm-mind-phq9-10`` and ``--rule
nm-bp-start-140`` show the two timelines.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

RULES = """\
# Local rules of the (invented) Northmere Community Clinics network, Vallmora.
[[rule]]
id = "nm-renal-30"
quantity = "egfr"
unit = "mL/min/1.73m2"
cutoff = 30
eligible = "below"
treatments = ["renal_referral"]
description = "Northmere kidney pathway: refer to the renal clinic when eGFR falls below 30."
source = "Invented for the cutscan demo (Northmere kidney pathway, 2018)"

[[rule]]
id = "nm-dsme-6.5"
quantity = "hba1c"
unit = "%"
cutoff = 6.5
eligible = "at_or_above"
treatments = ["diabetes_education"]
description = "Offer the structured diabetes education course from HbA1c 6.5% upwards."
source = "Invented for the cutscan demo (Northmere diabetes pathway, 2019)"

[[rule]]
id = "vm-brightpath-waiver"
quantity = "income"
unit = "thousand VMC/yr"
cutoff = 24
eligible = "at_or_below"
treatments = ["fee_waiver"]
description = "Brightpath fee waiver for households with income up to 24 thousand crowns a year."
source = "Invented for the cutscan demo (Vallmora Brightpath programme, 2017)"

[[rule]]
id = "vm-mind-phq9-10"
quantity = "phq9"
unit = "points"
cutoff = 10
eligible = "at_or_above"
effective_from = 2020-10-01
treatments = ["talk_therapy"]
description = "Vallmora Mind programme: refer to talking therapy from a PHQ-9 score of 10, starting October 2020."
source = "Invented for the cutscan demo (Vallmora Mind programme, 2020)"

[[rule]]
id = "nm-bp-start-150"
quantity = "sbp"
unit = "mmHg"
cutoff = 150
eligible = "at_or_above"
effective_to = 2021-06-30
group = "nm-bp-start"
treatments = ["bp_medication"]
description = "Northmere blood pressure pathway: start medication from systolic 150 mmHg (until mid-2021)."
source = "Invented for the cutscan demo (Northmere blood pressure pathway, 2016)"

[[rule]]
id = "nm-bp-start-140"
quantity = "sbp"
unit = "mmHg"
cutoff = 140
eligible = "at_or_above"
effective_from = 2021-07-01
group = "nm-bp-start"
replaces = "nm-bp-start-150"
treatments = ["bp_medication"]
description = "Northmere blood pressure pathway, revised: start medication from systolic 140 mmHg."
source = "Invented for the cutscan demo (Northmere blood pressure pathway, revised 2021)"

[[quantity]]
name = "income"
units = ["thousand VMC/yr"]
description = "Household income in thousands of Vallmora crowns a year (invented currency)."

[[quantity]]
name = "phq9"
units = ["points"]
description = "PHQ-9 depression questionnaire score, 0 to 27."
"""

SPEC = """\
title = "Vallmora registry screen (cutscan demo)"

[data]
source = "registry.parquet"
date = "visit_date"

[[running]]
column = "egfr"
quantity = "egfr"
unit = "mL/min/1.73m2"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "hba1c"
quantity = "hba1c"
unit = "%"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "frailty"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "income_k"
quantity = "income"
unit = "thousand VMC/yr"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "walk_minutes"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "mobility_grade"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "bmi"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "wait_days"
treatments = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
              "exercise_programme", "physio_referral", "dietitian_referral"]

[[running]]
column = "phq9"
quantity = "phq9"
unit = "points"
treatments = ["talk_therapy"]

[[running]]
column = "sbp"
quantity = "sbp"
unit = "mmHg"
treatments = ["bp_medication"]

[treatments]
columns = ["renal_referral", "diabetes_education", "home_nurse", "fee_waiver",
           "exercise_programme", "physio_referral", "dietitian_referral",
           "talk_therapy", "bp_medication"]

[covariates]
columns = ["age", "female", "prior_admissions"]

[outcomes]
columns = ["admitted_12m"]

[rules]
catalogues = ["northmere_rules.toml"]

[search]
alpha = 0.05
"""


def generate(n: int = 200_000, seed: int = 7):
    """Return the demo registry as a pandas DataFrame."""
    import pandas as pd
    rng = np.random.default_rng(seed)
    age = rng.integers(18, 91, n)
    female = (rng.random(n) < 0.52).astype(np.int8)
    prior = rng.poisson(np.clip(0.4 + 0.015 * (age - 18), 0.1, None))
    start = np.datetime64("2019-01-01")
    visit = start + rng.integers(0, 5 * 365, n).astype("timedelta64[D]")

    egfr = np.clip(np.rint(rng.normal(72, 24, n) - 0.2 * (age - 50)), 5, 130)
    renal = (egfr < 30).astype(np.int8)

    hba1c = np.clip(np.round(rng.normal(6.1, 0.8, n), 1), 4.0, 12.0)
    p_edu = 0.12 + 0.02 * (hba1c - 6.5) + 0.45 * (hba1c >= 6.5)
    edu = (rng.random(n) < np.clip(p_edu, 0, 1)).astype(np.int8)

    frailty = rng.beta(2.2, 4.0, n)
    p_nurse = 0.05 + 0.15 * frailty + 0.35 * (frailty >= 0.37)
    nurse = (rng.random(n) < p_nurse).astype(np.int8)

    income = np.round(rng.lognormal(np.log(31), 0.35, n), 1)
    movers = (income > 24.0) & (income <= 27.0) & (rng.random(n) < 1 / 3)
    income = np.where(movers, np.round(rng.uniform(23.0, 24.0, n), 1), income)
    p_waiver = np.where(income <= 24.0, 0.72, 0.06)
    waiver = (rng.random(n) < p_waiver).astype(np.int8)

    true_walk = rng.gamma(2.5, 14, n)
    rounder = rng.random(n) < 0.4
    walk = np.where(rounder, 10 * np.rint(true_walk / 10), np.rint(true_walk))
    p_ex = 0.10 + 0.001 * true_walk + 0.18 * rounder
    exercise = (rng.random(n) < p_ex).astype(np.int8)

    grade = rng.choice([1, 2, 3, 4, 5], n, p=[0.25, 0.25, 0.2, 0.18, 0.12])
    p_physio = 0.08 + 0.02 * grade + 0.40 * (grade >= 4)
    physio = (rng.random(n) < p_physio).astype(np.int8)

    bmi = np.clip(np.round(rng.normal(27.5, 5.0, n), 1), 15, 60)
    p_diet = 0.6 / (1 + np.exp(-(bmi - 31) / 2.5))
    diet = (rng.random(n) < p_diet).astype(np.int8)

    wait = rng.integers(0, 121, n)
    phq9, therapy, sbp, bp_med = _dated_rules(visit, np.random.default_rng([seed, 6]))
    admitted = (rng.random(n) < np.clip(0.08 + 0.002 * (age - 18) + 0.05 * (egfr < 45)
                                        + 0.03 * prior, 0, 1)).astype(np.int8)
    return pd.DataFrame({
        "person_id": [f"NM{i:07d}" for i in range(n)],
        "visit_date": visit,
        "age": age, "female": female, "prior_admissions": prior,
        "egfr": egfr, "hba1c": hba1c, "frailty": frailty, "income_k": income,
        "walk_minutes": walk, "mobility_grade": grade, "bmi": bmi, "wait_days": wait,
        "renal_referral": renal, "diabetes_education": edu, "home_nurse": nurse,
        "fee_waiver": waiver, "exercise_programme": exercise, "physio_referral": physio,
        "dietitian_referral": diet, "admitted_12m": admitted,
        "phq9": phq9, "sbp": sbp, "talk_therapy": therapy, "bp_medication": bp_med,
    })


MIND_START = np.datetime64("2020-10-01")      # vm-mind-phq9-10 takes effect
BP_MOVE = np.datetime64("2021-07-01")         # nm-bp-start: 150 mmHg → 140 mmHg


def _dated_rules(visit, rng):
    """The two rules with dates: PHQ-9 ≥ 10 from MIND_START; systolic 150 → 140 at BP_MOVE."""
    n = visit.size
    # Scores 0–27 with a linearly falling frequency, so the density is smooth at 10.
    k = np.arange(28)
    phq9 = rng.choice(k, n, p=(28 - k) / (28 - k).sum()).astype(float)
    after = visit >= MIND_START
    p_talk = 0.06 + 0.008 * phq9 + 0.30 * (after & (phq9 >= 10))
    therapy = (rng.random(n) < p_talk).astype(np.int8)
    sbp = np.clip(np.rint(rng.normal(136, 15, n)), 90, 220)
    line = np.where(visit >= BP_MOVE, 140.0, 150.0)
    p_med = 0.08 + 0.002 * (sbp - 120) + 0.45 * (sbp >= line)
    bp_med = (rng.random(n) < np.clip(p_med, 0, 1)).astype(np.int8)
    return phq9, therapy, sbp, bp_med


def write_inputs(folder: Path, n: int = 200_000, seed: int = 7) -> Path:
    """Write registry.parquet, northmere_rules.toml and spec.toml into ``folder``; return the spec path."""
    folder.mkdir(parents=True, exist_ok=True)
    generate(n, seed).to_parquet(folder / "registry.parquet", index=False)
    (folder / "northmere_rules.toml").write_text(RULES, encoding="utf-8")
    (folder / "spec.toml").write_text(SPEC, encoding="utf-8")
    return folder / "spec.toml"
