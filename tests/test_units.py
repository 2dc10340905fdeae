"""Unit conversions against published equations and their worked values, plus round trips."""
import numpy as np
import pytest
from hypothesis import given, strategies as st
from numpy.testing import assert_allclose

from scanner.candidates import declared
from scanner.rules import Rule
from scanner.spec import RunningSpec
from scanner.units import UnitError, convert, lookup, units_for


@pytest.mark.parametrize("ngsp, ifcc", [(5.7, 39), (6.5, 48), (7.0, 53)])
def test_hba1c_master_equation_matches_ada_pairings(ngsp, ifcc):
    # Source: IFCC–NGSP master equation NGSP = 0.0915·IFCC + 2.15 (Hoelzel et al., Clin Chem
    # 50:166–174, 2004; ngsp.org/ifcc.asp), and the ADA Standards of Care pairings
    # 5.7% ≈ 39, 6.5% ≈ 48, 7.0% ≈ 53 mmol/mol (verified, METHODS.md §15 rows 4 and 7).
    assert round(convert(ngsp, "%", "mmol/mol")) == ifcc
    assert_allclose(convert(ifcc, "mmol/mol", "%"), 0.0915 * ifcc + 2.15, rtol=0, atol=1e-12)


@pytest.mark.parametrize("ngsp, ifcc", [(5.0, 31), (6.0, 42), (8.0, 64), (9.0, 75), (10.0, 86)])
def test_hba1c_conversion_table_values(ngsp, ifcc):
    # Source: NGSP/IFCC conversion table (ngsp.org/ifcc.asp) — values from memory.
    assert round(convert(ngsp, "%", "mmol/mol")) == ifcc


def test_hba1c_slope_is_the_quoted_10_929():
    # Source: IFCC master equation in its IFCC-from-NGSP form, mmol/mol = 10.929·(% − 2.15)
    # (information.ifcchba1c.org master equations; METHODS.md §15 row 28).
    assert_allclose(convert(6.5, "%", "mmol/mol"), 10.929 * (6.5 - 2.15), rtol=1e-4)
    assert_allclose(convert(6.5, "%", "mmol/mol"), 47.54, atol=0.01)


@pytest.mark.parametrize("mg_dl, mmol_l", [(100, 5.6), (126, 7.0), (140, 7.8), (200, 11.1)])
def test_glucose_molar_mass_factor_matches_ada_pairings(mg_dl, mmol_l):
    # Source: glucose molar mass 180.156 g/mol → 18.016 mg/dL per mmol/L; ADA pairings
    # 100/5.6, 126/7.0, 140/7.8, 200/11.1 (verified, METHODS.md §15 rows 5–6).
    assert_allclose(convert(mg_dl, "mg/dL", "mmol/L", "fasting_glucose"), mg_dl / 18.016, rtol=1e-12)
    assert round(convert(mg_dl, "mg/dL", "mmol/L"), 1) == mmol_l


def test_glucose_factor_from_molar_mass():
    # Source: molar mass of glucose C6H12O6 = 180.156 g/mol (standard atomic weights, from memory):
    # 1 mmol/L = 180.156 mg/L = 18.0156 mg/dL.
    assert_allclose(convert(1, "mmol/L", "mg/dL"), 180.156 / 10, rtol=1e-4)


def test_ldl_uses_cholesterol_factor_not_glucose():
    # Source: 2018 AHA/ACC pairing LDL-C 190 mg/dL = 4.9 mmol/L (verified, METHODS.md §15 row 13).
    assert round(convert(190, "mg/dL", "mmol/L", "ldl"), 1) == 4.9


def test_pound_is_exact_and_ages_convert():
    # Source: international avoirdupois pound, 1 lb = 0.45359237 kg exactly (1959 agreement).
    assert convert(1, "lb", "kg") == pytest.approx(0.45359237, abs=1e-15)
    assert_allclose(convert(2500, "g", "lb"), 2.5 / 0.45359237, rtol=1e-12)
    # Julian year of 365.25 days (common practice for ages kept in days); 12 months a year.
    assert_allclose(convert(65 * 365.25, "days", "years"), 65, rtol=1e-12)
    assert_allclose(convert(18, "months", "years"), 1.5, rtol=1e-12)
    assert_allclose(convert(37, "weeks", "days"), 259, rtol=1e-12)


units = st.sampled_from([("%", "mmol/mol", None), ("mg/dL", "mmol/L", "glucose"),
                         ("mg/dL", "mmol/L", "ldl"), ("lb", "kg", None), ("g", "lb", None),
                         ("days", "years", None), ("months", "years", None),
                         ("mg/g", "mg/mmol", None), ("g/dL", "g/L", None)])


@given(pair=units, value=st.floats(-1e4, 1e4, allow_nan=False))
def test_round_trip(pair, value):
    a, b, q = pair
    assert_allclose(convert(convert(value, a, b, q), b, a, q), value, rtol=1e-9, atol=1e-9)


def test_spellings_are_normalised():
    assert convert(126, "mg / dl", "MMOL/L") == convert(126, "mg/dL", "mmol/L")
    assert lookup("mL/min/1.73 m²").dimension == "egfr"
    assert "mmol/mol" in units_for("hba1c")


def test_unconvertible_units_name_both():
    with pytest.raises(UnitError, match=r"'%' to 'kg'.*different things"):
        convert(6.5, "%", "kg")
    with pytest.raises(UnitError, match=r"'furlongs' to 'years'.*'furlongs' is not known"):
        convert(3, "furlongs", "years", "age")


def _rule(unit, cutoff=6.5):
    return Rule("r1", "hba1c", cutoff, "at_or_above", "test", unit, file="cat.toml", line=3)


def test_declared_converts_rule_to_column_unit():
    run = RunningSpec("a1c_ifcc", "hba1c", "mmol/mol")
    cands, notes = declared(run, ["edu"], [_rule("%")])
    assert_allclose(cands[0].cutoff, (6.5 - 2.15) / 0.0915, rtol=1e-12)   # IFCC–NGSP master equation
    assert "mmol/mol" in notes[0] and "r1" in notes[0]
    same, notes = declared(RunningSpec("a1c", "hba1c", "%"), ["edu"], [_rule("%")])
    assert same[0].cutoff == 6.5 and not notes


def test_declared_unconvertible_is_an_error_naming_both_units():
    run = RunningSpec("a1c", "hba1c", "mg/dL")
    with pytest.raises(UnitError, match=r"cat.toml:line 3: rule 'r1' is stated in '%' but column "
                                         r"'a1c' is recorded in 'mg/dL'"):
        declared(run, ["edu"], [_rule("%")])


def test_scan_matches_a_percent_rule_to_an_ifcc_column(tmp_path):
    # The rule is in %, the column in mmol/mol; the candidate sits at the master-equation value.
    import numpy as np
    import pandas as pd
    from scanner.scan import scan
    rng = np.random.default_rng(2)
    a1c = rng.integers(30, 70, 5000).astype(float)
    edu = (rng.random(a1c.size) < 0.1 + 0.5 * (a1c >= 48)).astype(float)
    cat = tmp_path / "r.toml"
    cat.write_text('[[rule]]\nid = "dx"\nquantity = "hba1c"\nunit = "%"\ncutoff = 6.5\n'
                   'eligible = "at_or_above"\nsource = "test"\n')
    spec = {"running": [{"column": "a1c", "quantity": "hba1c", "unit": "mmol/mol"}],
            "treatments": {"columns": ["edu"]}, "rules": {"catalogues": [str(cat)]},
            "search": {"round_numbers": False}}
    res = scan(spec, pd.DataFrame({"a1c": a1c, "edu": edu}))
    row = res.rows[0]
    assert row["rule_id"] == "dx"
    assert_allclose(row["cutoff_declared"], (6.5 - 2.15) / 0.0915, rtol=1e-12)   # IFCC–NGSP master equation
    # 47.54 falls between the recorded whole numbers 47 and 48: applied literally, x ≥ 48.
    assert row["cutoff"] == 48.0 and (row["split_low"], row["split_high"]) == (47.0, 48.0)
    assert row["jump"] > 0.4 and any("47.5" in n for n in res.notes)


# ---------------------------------------------------------------------- plausible ranges, codes
def test_plausible_hba1c_range_in_mmol_mol_follows_the_master_equation():
    # IFCC–NGSP master equation, NGSP % = 0.0915 · IFCC mmol/mol + 2.15 (Hoelzel et al., Clin
    # Chem 2004): the % limits 3 and 20 are (3 − 2.15)/0.0915 and (20 − 2.15)/0.0915 mmol/mol.
    from scanner.units import plausible_range
    lo, hi = plausible_range("hba1c", "mmol/mol")
    assert_allclose([lo, hi], [(3 - 2.15) / 0.0915, (20 - 2.15) / 0.0915], rtol=1e-12)
    assert plausible_range("hba1c", "%") == (3.0, 20.0)
    assert plausible_range("phq9", "points") is None          # no range: codes are kept
    # the mg/dL limits move to mmol/L by the glucose factor 18.016 (molar mass 180.156 g/mol)
    assert_allclose(plausible_range("fasting_glucose", "mmol/L")[0], 20 / 18.016, rtol=1e-12)


def test_convert_array_is_convert_elementwise():
    from scanner.units import convert, convert_array
    v = np.array([31.0, 48.0, 53.0, 64.0])
    assert_allclose(convert_array(v, "mmol/mol", "%", "hba1c"),
                    [convert(x, "mmol/mol", "%", "hba1c") for x in v], rtol=0, atol=0)
    # 48 mmol/mol is 6.5 % to one decimal (the diagnostic threshold in both units, from memory)
    assert round(float(convert_array([48.0], "mmol/mol", "%", "hba1c")[0]), 1) == 6.5


@pytest.mark.parametrize("values,codes", [
    (lambda r: r.integers(0, 100, 3000), []),                          # 99 is the scale's end
    (lambda r: np.r_[r.integers(1, 6, 3000), [9] * 40], [9.0]),        # grade 1–5, 9 = unknown
    (lambda r: r.poisson(1.5, 200_000), []),                           # smooth tail up to 8, 9
    (lambda r: np.r_[np.clip(np.round(r.normal(62, 22, 3000)), 5, 140), [999] * 40, [-99] * 30],
     [-99.0, 999.0]),
    (lambda r: np.r_[r.integers(18, 91, 3000), [99] * 40], [99.0]),    # age 99 = unknown
    (lambda r: np.r_[r.integers(18, 91, 3000), [99] * 3], []),         # too few to be a spike
])
def test_sentinel_spikes(values, codes):
    from scanner.quality import sentinel_spikes
    got = sentinel_spikes(np.asarray(values(np.random.default_rng(1)), dtype=float))
    assert got == codes


def test_mixed_units_says_when_most_rows_are_in_the_other_unit():
    # 40% of a glucose column in mg/dL, 60% in mmol/L (x 18.016 mg/dL per mmol/L, from memory):
    # the warning must not say "most values fit mg/dL" and must point to the unit key.
    import numpy as np
    import pandas as pd
    from scanner.scan import scan
    rng = np.random.default_rng(4)
    mgdl = np.round(rng.normal(100, 15, 6000))
    other = rng.random(mgdl.size) < 0.6
    g = np.where(other, np.round(mgdl / 18.016, 1), mgdl)
    d = (rng.random(g.size) < 0.3).astype(float)
    res = scan({"running": [{"column": "g", "quantity": "fasting_glucose", "unit": "mg/dL"}],
                "treatments": {"columns": ["d"]}, "search": {"round_numbers": False,
                                                            "discover": False}},
               pd.DataFrame({"g": g, "d": d}))
    w = next(w for w in res.warnings if w["kind"] == "mixed_units")
    share = round(100 * (1 - w["count"] / g.size))
    assert f"{share}% of the values fit mg/dL" in w["message"] and share < 50
    assert "More than half the rows fit only mmol/L" in w["message"]
    assert 'set unit = "mmol/L"' in w["message"]


@pytest.mark.parametrize("missing", [0.0, 0.7])
def test_unit_switch_after_the_profile_is_warned(monkeypatch, missing):
    # A glucose column in mg/dL whose later rows (after the rows profiled before the pass) are
    # in mmol/L: the profile sees one unit, the bins of the whole table two.  Without the check
    # on the bins the scan said nothing.  With 70% of the column missing its own values (about
    # 2,400) never outnumber the 3,000 rows profiled, yet the switch comes after the profile:
    # the check once compared the column's values with the rows profiled and was skipped.
    import numpy as np
    import pandas as pd
    from scanner import quality
    from scanner.scan import scan
    monkeypatch.setattr(quality, "PROFILE_ROWS", 3000)
    rng = np.random.default_rng(9)
    mgdl = np.round(rng.normal(100, 15, 8000))
    late = np.arange(mgdl.size) >= 5000
    g = np.where(late, np.round(mgdl / 18.016, 1), mgdl)   # mmol/L (180.16 g/mol, from memory)
    gone = rng.random(g.size) < missing
    g[gone] = np.nan
    d = (rng.random(g.size) < 0.3).astype(float)
    spec = {"running": [{"column": "g", "quantity": "fasting_glucose", "unit": "mg/dL"}],
            "treatments": {"columns": ["d"]},
            "search": {"round_numbers": False, "discover": False}}
    res = scan(spec, pd.DataFrame({"g": g, "d": d}))
    w = [w for w in res.warnings if w["kind"] == "mixed_units"]
    assert len(w) == 1
    assert "after its first 3,000 rows" in w[0]["message"]
    assert w[0]["count"] == int((late & ~gone).sum())
    assert "unit_column" in w[0]["message"]
    # the same column all in mg/dL: no warning
    mgdl[gone] = np.nan
    res = scan(spec, pd.DataFrame({"g": mgdl, "d": d}))
    assert not [w for w in res.warnings if w["kind"] in ("mixed_units", "wrong_unit")]
