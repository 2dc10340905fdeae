"""An invented clinic-visit extract with planted mess, and the truth planted in it.

Setting (invented): visits of the fictional Harrowgate outpatient service.  The table holds
repeated persons under an identifier not named like one (``pt_no``), HbA1c in % and in mmol/mol
(with a unit column), eGFR with the missing codes −99 and 999, LDL recorded in mmol/L to 0.1
while its rule is stated at 190 mg/dL, fasting glucose recorded in mmol/L but declared as mg/dL,
sex coded M/F, a statin flag coded 1 = yes / 2 = no and a fee-waiver flag that is always 0.

``write(folder, kind)`` renders it as a ";" CSV with decimal commas (``csv``), a Stata file with
value labels (``dta``) or an all-text Parquet file (``parquet``), with a rule catalogue and a
spec.  Used by tests/test_errors_extract.py; invented data only.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

RULES = """\
[[rule]]
id = "hg-hba1c-6.5"
quantity = "hba1c"
unit = "%"
cutoff = 6.5
eligible = "at_or_above"
treatments = ["dsme"]
description = "Invented: self-management course from HbA1c 6.5 %."
source = "Invented for cutscan's tests"

[[rule]]
id = "hg-egfr-30"
quantity = "egfr"
unit = "mL/min/1.73m2"
cutoff = 30
eligible = "below"
treatments = ["renal"]
description = "Invented: renal clinic below eGFR 30."
source = "Invented for cutscan's tests"

[[rule]]
id = "hg-ldl-190"
quantity = "ldl"
unit = "mg/dL"
cutoff = 190
eligible = "at_or_above"
treatments = ["statin"]
description = "Invented: statin from LDL 190 mg/dL."
source = "Invented for cutscan's tests"

[[rule]]
id = "hg-glucose-126"
quantity = "fasting_glucose"
unit = "mg/dL"
cutoff = 126
eligible = "at_or_above"
treatments = ["dsme"]
description = "Invented: course from fasting glucose 126 mg/dL."
source = "Invented for cutscan's tests"
"""

MMOL_PER_PCT, PCT_AT_ZERO = 0.0915, 2.15       # IFCC–NGSP master equation (NGSP = 0.0915·IFCC + 2.15)


def frame(n: int = 8000, seed: int = 3) -> tuple[pd.DataFrame, dict]:
    """The extract as typed columns, and the planted truth."""
    rng = np.random.default_rng(seed)
    persons = rng.integers(0, int(n * 0.7), n) + 40_000
    visit = np.datetime64("2020-01-01") + rng.integers(0, 900, n).astype("timedelta64[D]")
    pct = np.clip(np.round(rng.normal(6.3, 0.9, n), 1), 4.3, 13.0)
    dsme = (rng.random(n) < 0.08 + 0.55 * (pct >= 6.5)).astype(int)
    mmol = rng.random(n) < 0.25
    unit = np.where(mmol, np.where(rng.random(n) < 0.5, "mmol/mol", "IFCC"),
                    np.where(rng.random(n) < 0.5, "%", "pct"))
    hba1c = np.where(mmol, np.round((pct - PCT_AT_ZERO) / MMOL_PER_PCT), pct)
    egfr = np.clip(np.round(rng.normal(62, 22, n)), 5, 140)
    renal = (rng.random(n) < 0.05 + 0.6 * (egfr < 30)).astype(int)
    code = rng.random(n)
    egfr = np.where(code < 0.01, -99.0, np.where(code > 0.985, 999.0, egfr))
    ldl = np.clip(np.round(rng.normal(3.6, 0.9, n), 1), 1.0, 8.0)
    statin = np.where(rng.random(n) < 0.1 + 0.5 * (ldl >= 190 / 38.67), 1, 2)   # 1 = yes, 2 = no
    glucose = np.clip(np.round(rng.normal(6.2, 1.4, n), 1), 3.0, 18.0)          # mmol/L
    sex = np.where(rng.random(n) < 0.5, "F", "M")
    age = rng.integers(30, 86, n)
    df = pd.DataFrame({"pt_no": persons, "visit": visit, "hba1c": hba1c, "hba1c_unit": unit,
                       "egfr": egfr, "ldl": ldl, "glucose": glucose, "sex": sex, "age": age,
                       "dsme": dsme, "renal": renal, "statin": statin,
                       "fee_waiver": np.zeros(n, int)})
    truth = {
        "n": n,
        "repeats": int(n - np.unique(persons).size),
        "mmol_rows": int(mmol.sum()),
        "egfr_codes": {-99.0: int((egfr == -99).sum()), 999.0: int((egfr == 999).sum())},
        "egfr_rows": int(((egfr != -99) & (egfr != 999)).sum()),
        "ldl_split": (4.9, 5.0),
        "ldl_rows_at_split": int(((ldl == 4.9) | (ldl == 5.0)).sum()),
        "float_cells": {c: n for c in ("hba1c", "egfr", "ldl", "glucose")},
    }
    return df, truth


SPEC = """\
title = "Harrowgate visits (invented)"
[data]
source = "{source}"
date = "visit"
{data}
[data.value_map]
sex = {{ F = 1, M = 0 }}
{statin_map}
[[running]]
column = "hba1c"
quantity = "hba1c"
unit = "%"
treatments = ["dsme"]
{unit_column}
[[running]]
column = "egfr"
quantity = "egfr"
unit = "mL/min/1.73m2"
treatments = ["renal", "fee_waiver"]

[[running]]
column = "ldl"
quantity = "ldl"
unit = "mmol/L"
treatments = ["statin"]

[[running]]
column = "glucose"
quantity = "fasting_glucose"
unit = "mg/dL"
treatments = ["dsme"]

[treatments]
columns = ["dsme", "renal", "statin", "fee_waiver"]

[covariates]
columns = ["age", "sex"]

[rules]
catalogues = ["rules.toml"]

[search]
round_numbers = false
discover = false
"""


def write(folder: Path, kind: str, unit_column: bool = False, data: str = "",
          n: int = 8000) -> tuple[Path, dict]:
    """Write the extract as ``kind`` ("csv", "dta" or "parquet") with its spec; return the
    spec path and the planted truth."""
    folder.mkdir(parents=True, exist_ok=True)
    df, truth = frame(n)
    if kind == "csv":
        name = "visits.csv"
        df.assign(visit=df.visit.dt.strftime("%d.%m.%Y")).to_csv(
            folder / name, sep=";", decimal=",", index=False)
        statin_map = "statin = { 1 = 1, 2 = 0 }"
    elif kind == "dta":
        name = "visits.dta"
        df.to_stata(folder / name, write_index=False, value_labels={"statin": {1: "yes", 2: "no"}})
        statin_map = ""                      # the value labels say it
    else:
        name = "visits.parquet"
        text = df.assign(visit=df.visit.dt.strftime("%Y-%m-%d"))
        text = text.astype(str)
        text.to_parquet(folder / name, index=False)
        statin_map = "statin = { 1 = 1, 2 = 0 }"
    uc = ('unit_column = "hba1c_unit"\nunit_map = { pct = "%", IFCC = "mmol/mol" }'
          if unit_column else "")
    (folder / "rules.toml").write_text(RULES, encoding="utf-8")
    spec = folder / f"spec-{kind}.toml"
    spec.write_text(SPEC.format(source=name, data=data, statin_map=statin_map, unit_column=uc),
                    encoding="utf-8")
    return spec, truth
