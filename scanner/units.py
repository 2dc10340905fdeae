"""Units of the quantities that rule catalogues refer to, and conversions between them.

A rule stated in one unit (HbA1c in %) can be matched to a column recorded in another
(HbA1c in mmol/mol) by converting the rule's cutoff onto the column's scale.  Each quantity
belongs to a *dimension*; units convert only within a dimension, and a pair that cannot be
converted raises :class:`UnitError` naming both units.

Conversions and their sources
-----------------------------
=================  ========================================  ==============================================
dimension          conversion                                source
=================  ========================================  ==============================================
hba1c              mmol/mol = (% − 2.15) / 0.0915            IFCC–NGSP master equation, NGSP = 0.0915·IFCC
                   % = 0.0915 · mmol/mol + 2.15              + 2.15 (Hoelzel et al., Clin Chem 50:166–174,
                                                             2004; ngsp.org/ifcc.asp). The slope 10.929 often
                                                             quoted is 1/0.0915 rounded.
glucose            mmol/L = mg/dL / 18.016                   glucose molar mass 180.156 g/mol (one mmol/L is
                                                             180.156 mg/L = 18.0156 mg/dL)
ldl / cholesterol  mmol/L = mg/dL / 38.67                    cholesterol molar mass 386.65 g/mol (from memory)
albuminuria (ACR)  mg/g = 8.84 · mg/mmol                     creatinine molar mass 113.12 g/mol (from memory)
haemoglobin        g/L = 10 · g/dL                           definition of the decilitre
mass               kg = 0.45359237 · lb, g = 1000 · kg       international avoirdupois pound (1959), exact
age / duration     years = days / 365.25 = months / 12,      Julian year of 365.25 days (common practice for
                   weeks = days / 7                          ages in days)
=================  ========================================  ==============================================

Unit spellings are matched case-insensitively with spaces removed, so ``mg/dL``, ``mg/dl`` and
``mg / dL`` are the same unit.
"""
from __future__ import annotations

from dataclasses import dataclass

from .errors import InputError


class UnitError(InputError):
    """A cutoff cannot be moved from one unit to another."""


@dataclass(frozen=True)
class Unit:
    """A unit as an affine map onto its dimension's base scale: ``base = scale · value + offset``."""

    name: str
    dimension: str
    scale: float = 1.0
    offset: float = 0.0


# One entry per unit; the first unit listed for a dimension is its base (scale 1, offset 0).
_HBA1C_SLOPE = 0.0915       # NGSP % per IFCC mmol/mol (IFCC–NGSP master equation)
_HBA1C_OFFSET = 2.15        # NGSP % at IFCC 0 (IFCC–NGSP master equation)
GLUCOSE_MG_DL_PER_MMOL_L = 18.016   # 180.156 g/mol / 10 dL per L, rounded as usually quoted
CHOLESTEROL_MG_DL_PER_MMOL_L = 38.67  # 386.65 g/mol / 10 (from memory)
ACR_MG_G_PER_MG_MMOL = 8.84   # 1000 / 113.12 g/mol creatinine (from memory)
LB_KG = 0.45359237          # exact since the 1959 international yard and pound agreement
DAYS_PER_YEAR = 365.25      # Julian year (common practice for ages given in days)

UNITS: dict[str, Unit] = {}


def _add(dimension: str, names, scale: float = 1.0, offset: float = 0.0) -> None:
    names = [names] if isinstance(names, str) else names
    for n in names:
        UNITS[_norm(n)] = Unit(names[0], dimension, scale, offset)


def _norm(name: str) -> str:
    return "".join(str(name).split()).lower().replace("²", "2")


# base unit of each dimension first
_add("hba1c", ["%", "percent", "% NGSP", "%DCCT"])
_add("hba1c", ["mmol/mol", "mmol/mol IFCC"], _HBA1C_SLOPE, _HBA1C_OFFSET)
_add("glucose", ["mg/dL", "mg/100mL"])
_add("glucose", ["mmol/L", "mM"], GLUCOSE_MG_DL_PER_MMOL_L)
_add("acr", ["mg/g", "mg/g creatinine"])
_add("acr", ["mg/mmol", "mg/mmol creatinine"], ACR_MG_G_PER_MG_MMOL)
_add("haemoglobin", ["g/dL"])
_add("haemoglobin", ["g/L"], 0.1)
_add("mass", ["kg", "kilogram", "kilograms"])
_add("mass", ["g", "gram", "grams"], 0.001)
_add("mass", ["lb", "lbs", "pound", "pounds"], LB_KG)
_add("duration", ["years", "year", "yr", "yrs", "y"])
_add("duration", ["months", "month", "mo"], 1 / 12)
_add("duration", ["weeks", "week", "wk", "wks"], 7 / DAYS_PER_YEAR)
_add("duration", ["days", "day", "d"], 1 / DAYS_PER_YEAR)
_add("egfr", ["mL/min/1.73m2", "ml/min/1.73 m2", "mL/min per 1.73m2"])
_add("pressure", ["mmHg", "mm Hg"])
_add("bmi", ["kg/m2"])
_add("percent_risk", ["% 10-yr risk", "%10y"])
_add("t_score", ["SD", "T-score", "standard deviations"])
_add("percent_poverty", ["% FPL", "% of poverty line", "% poverty line"])
_add("pack_years", ["pack-years", "pack years"])

# Quantities name what is measured; several quantities share a dimension (fasting and 2-hour
# glucose are both glucose).  Lipid quantities use their own table because mg/dL means a
# different molar factor for cholesterol than for glucose.
QUANTITIES: dict[str, str] = {
    "egfr": "egfr", "acr": "acr",
    "hba1c": "hba1c", "fasting_glucose": "glucose", "glucose_2h": "glucose", "glucose": "glucose",
    "sbp": "pressure", "dbp": "pressure",
    "ldl": "cholesterol", "total_cholesterol": "cholesterol",
    "ascvd_risk": "percent_risk", "bmi": "bmi", "t_score": "t_score",
    "birth_weight": "mass", "weight": "mass", "gestational_age": "duration",
    "age": "duration", "haemoglobin": "haemoglobin",
    "income_fpl": "percent_poverty", "pack_years": "pack_years",
}

_CHOLESTEROL = {_norm("mg/dL"): Unit("mg/dL", "cholesterol"),
                _norm("mmol/L"): Unit("mmol/L", "cholesterol", CHOLESTEROL_MG_DL_PER_MMOL_L),
                _norm("mM"): Unit("mmol/L", "cholesterol", CHOLESTEROL_MG_DL_PER_MMOL_L)}


def lookup(name: str, quantity: str | None = None) -> Unit | None:
    """The :class:`Unit` called ``name`` (for ``quantity`` when given), or None if unknown."""
    key = _norm(name)
    if quantity and QUANTITIES.get(quantity) == "cholesterol":
        return _CHOLESTEROL.get(key)
    unit = UNITS.get(key)
    if unit and quantity in QUANTITIES and unit.dimension != QUANTITIES[quantity]:
        return None
    return unit


def units_for(quantity: str) -> list[str]:
    """Unit names accepted for a known quantity (empty for an unknown quantity)."""
    dim = QUANTITIES.get(quantity)
    if dim is None:
        return []
    table = _CHOLESTEROL if dim == "cholesterol" else UNITS
    return sorted({u.name for u in table.values() if u.dimension == dim})


def same_unit(a: str | None, b: str | None) -> bool:
    """True when two spellings name the same unit (or either is missing)."""
    if not a or not b:
        return True
    ua, ub = UNITS.get(_norm(a)), UNITS.get(_norm(b))
    if ua and ub:
        return ua == ub
    return _norm(a) == _norm(b)


def convert(value: float, from_unit: str, to_unit: str, quantity: str | None = None) -> float:
    """Express ``value`` given in ``from_unit`` in ``to_unit``.

    Parameters
    ----------
    value : the number to convert (e.g. a rule's cutoff).
    from_unit, to_unit : unit spellings (see the module table).
    quantity : optional quantity name; needed for lipids, whose mg/dL ↔ mmol/L factor differs
        from glucose's.

    Returns
    -------
    float, the same amount on the ``to_unit`` scale.

    Raises
    ------
    UnitError when either unit is unknown or the two belong to different dimensions; the
    message names both units.

    Notes
    -----
    Affine maps through each dimension's base unit; sources in the module docstring.
    """
    if _norm(from_unit) == _norm(to_unit):
        return float(value)
    a, b = lookup(from_unit, quantity), lookup(to_unit, quantity)
    what = f" for {quantity}" if quantity else ""
    if a is None or b is None:
        unknown = from_unit if a is None else to_unit
        known = units_for(quantity) if quantity else []
        hint = f" Units known{what}: {', '.join(known)}." if known else ""
        raise UnitError(f"cannot convert {from_unit!r} to {to_unit!r}{what}: unit {unknown!r} is "
                        f"not known.{hint} State the rule in the column's unit, or record the "
                        "column in a listed unit.")
    if a.dimension != b.dimension:
        raise UnitError(f"cannot convert {from_unit!r} to {to_unit!r}{what}: they measure "
                        f"different things ({a.dimension} vs {b.dimension}).")
    base = a.scale * float(value) + a.offset
    return (base - b.offset) / b.scale


# ---------------------------------------------------------------------- plausible ranges
# Generous limits of values that can be recorded for a living person, in one unit per quantity;
# the other units of the quantity get the same limits converted through ``convert`` (so HbA1c
# in mmol/mol inherits the % limits through the IFCC–NGSP master equation).  They serve two
# checks only: a missing code such as 999 lies outside them, and a value that fits only another
# unit of the quantity reveals a column holding two units.  Limits are wide on purpose: a value
# inside them is never changed.
#   quantity: (low, high, unit, source)
PLAUSIBLE: dict[str, tuple[float, float, str, str]] = {
    "hba1c": (3.0, 20.0, "%", "reportable range of NGSP-certified HbA1c methods, about 3–20 % "
              "(from memory); mmol/mol limits by the IFCC–NGSP master equation"),
    "egfr": (1.0, 200.0, "mL/min/1.73m2", "CKD-EPI eGFR of adults rarely exceeds 150 (from "
             "memory); 1–200 is a generous bound (common practice)"),
    "fasting_glucose": (20.0, 1000.0, "mg/dL", "glucose above 1000 mg/dL or below 20 mg/dL is "
                        "incompatible with an outpatient visit (from memory)"),
    "glucose_2h": (20.0, 1000.0, "mg/dL", "as fasting glucose (from memory)"),
    "glucose": (20.0, 1000.0, "mg/dL", "as fasting glucose (from memory)"),
    "acr": (0.0, 10000.0, "mg/g", "nephrotic-range albuminuria stays below 10,000 mg/g (from memory)"),
    "haemoglobin": (2.0, 25.0, "g/dL", "survivable haemoglobin concentrations (from memory)"),
    "sbp": (40.0, 300.0, "mmHg", "measurable systolic pressures (common practice)"),
    "dbp": (20.0, 200.0, "mmHg", "measurable diastolic pressures (common practice)"),
    "ldl": (10.0, 1000.0, "mg/dL", "LDL cholesterol including familial hypercholesterolaemia "
            "(from memory)"),
    "total_cholesterol": (30.0, 1500.0, "mg/dL", "total cholesterol (from memory)"),
    "bmi": (8.0, 100.0, "kg/m2", "body-mass index of living adults (from memory)"),
    "age": (0.0, 125.0, "years", "oldest verified human age is about 122 years (from memory)"),
    "gestational_age": (16.0, 47.0, "weeks", "gestational age at birth or visit (common practice)"),
    "birth_weight": (0.2, 7.5, "kg", "recorded birth weights (from memory)"),
    "weight": (0.2, 400.0, "kg", "recorded body weights (from memory)"),
    "t_score": (-8.0, 6.0, "SD", "bone densitometry T-scores (from memory)"),
    "ascvd_risk": (0.0, 100.0, "% 10-yr risk", "a risk in per cent (definition)"),
    "income_fpl": (0.0, 10000.0, "% FPL", "income as a percentage of a poverty line (common practice)"),
    "pack_years": (0.0, 300.0, "pack-years", "smoking history (common practice)"),
}


def plausible_range(quantity: str | None, unit: str | None) -> tuple[float, float] | None:
    """Plausible (low, high) of ``quantity`` expressed in ``unit``; None when unknown.

    With no ``unit`` the range is given in the quantity's reference unit (the table above).
    """
    if not quantity or quantity not in PLAUSIBLE:
        return None
    lo, hi, ref, _ = PLAUSIBLE[quantity]
    if not unit or same_unit(unit, ref):
        return lo, hi
    try:
        a, b = convert(lo, ref, unit, quantity), convert(hi, ref, unit, quantity)
    except UnitError:
        return None
    return (min(a, b), max(a, b))


def convert_array(values, from_unit: str, to_unit: str, quantity: str | None = None):
    """``convert`` for a numpy array (same affine map, applied element by element)."""
    import numpy as np
    v = np.asarray(values, dtype=float)
    if _norm(from_unit) == _norm(to_unit):
        return v.copy()
    a, b = lookup(from_unit, quantity), lookup(to_unit, quantity)
    if a is None or b is None or a.dimension != b.dimension:
        convert(1.0, from_unit, to_unit, quantity)        # raises the UnitError with its message
    return ((a.scale * v + a.offset) - b.offset) / b.scale
