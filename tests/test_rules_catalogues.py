"""Shipped rule catalogues validate; broken catalogues give file:line errors; rules list/validate CLI."""
import re
from pathlib import Path

import pytest

from scanner.errors import SpecError
from scanner.rules import group_of, load_rules, shipped_catalogues, shipped_dir, validate_catalogues
from scanner.units import QUANTITIES

from .conftest import ROOT, run_cli

FORBIDDEN = re.compile(r"\bHIV\b|CD4|1500\s*g|very[- ]low[- ]birth|drinking age|air[- ]quality|"
                       r"premium|cigarette", re.I)


def test_shipped_catalogues_validate_and_cover_the_domains():
    files = shipped_catalogues()
    assert shipped_dir() == ROOT / "rules"
    rules, problems = validate_catalogues(files)
    assert problems == []
    assert len(rules) >= 25
    quantities = {r.quantity for r in rules}
    for q in ("egfr", "hba1c", "fasting_glucose", "sbp", "ldl", "ascvd_risk", "bmi", "t_score",
              "birth_weight", "gestational_age", "age", "income_fpl"):
        assert q in quantities, q
    for r in rules:
        assert r.source and r.description, r.id
        # every entry says whether its value was checked (METHODS.md §15 status column)
        assert re.search(r"verified|from memory", r.source), r.id
        assert r.eligible in ("below", "at_or_below", "above", "at_or_above")
        assert not FORBIDDEN.search(r.description + r.source), r.id


def test_changed_rules_form_groups_with_dates():
    rules = load_rules(shipped_catalogues())
    by_id = {r.id: r for r in rules}
    grp = group_of(by_id["acc-aha-htn-sbp-130"], rules)
    assert [r.id for r in grp] == ["jnc7-htn-sbp-140", "acc-aha-htn-sbp-130"]
    assert grp[0].effective_to < grp[1].effective_from
    assert [r.cutoff for r in group_of(by_id["uspstf-crc-50"], rules)] == [50, 45]


BROKEN = """\
[[rule]]
id = "a"
quantity = "egfr"
unit = "mL/min/1.73m2"
cutoff = 30
eligible = "below"
source = "test (from memory)"

[[rule]]
id = "a"
quantity = "egfrr"
cutoff = 60
eligible = "under"
source = "test"

[[rule]]
id = "c"
quantity = "hba1c"
unit = "furlongs"
cutoff = 6.5
eligible = "at_or_above"
effective_from = "2019-02-30"
source = "test"

[[rule]]
id = "d"
quantity = "age"
unit = "years"
cutoff = 65
eligible = "at_or_above"
effective_from = 2020-01-01
effective_to = 2019-01-01
replaces = "zz"
source = "test"

[[rule]]
id = "e"
quantity = "age"
unit = "years"
cutoff = "65"
eligible = "at_or_above"
effective_from = 1066-10-14
cutof = 3
source = "test"
"""


def test_broken_catalogue_lists_every_problem_with_its_line(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text(BROKEN)
    _, problems = validate_catalogues([p])
    got = [(x.line, x.message.split(" ")[0]) for x in problems]
    text = [str(x) for x in problems]
    assert f"{p}:line 10: duplicate rule id 'a'" in "\n".join(text)
    assert (13, "eligible") in got                    # eligible = 'under'
    assert any(s.startswith(f"{p}:line 22: effective_from = '2019-02-30' is not a date") for s in text)
    assert any(s.startswith(f"{p}:line 32: effective_to 2019-01-01 is before") for s in text)
    assert any(s.startswith(f"{p}:line 40: cutoff = '65' must be a number") for s in text)
    assert any(s.startswith(f"{p}:line 43: unknown rule key 'cutof' (did you mean 'cutoff'?)") for s in text)
    # one problem per broken key, in line order; rules with a structural problem are not
    # checked further, so the bad unit of rule 'c' (line 19) is not reported on top of its date
    assert [x.line for x in problems] == [10, 13, 22, 32, 40, 43]


def test_strict_checks_unknown_quantity_unit_dates_and_replaces(tmp_path):
    p = tmp_path / "strict.toml"
    p.write_text("""\
[[rule]]
id = "x1"
quantity = "egfrr"
cutoff = 60
eligible = "below"
source = "test"

[[rule]]
id = "x2"
quantity = "hba1c"
unit = "furlongs"
cutoff = 6.5
eligible = "at_or_above"
source = "test"

[[rule]]
id = "x3"
quantity = "age"
unit = "years"
cutoff = 65
eligible = "at_or_above"
effective_from = 1066-10-14
replaces = "x9"
source = "test"
""")
    _, problems = validate_catalogues([p])
    text = "\n".join(str(x) for x in problems)
    assert f"{p}:line 3: unknown quantity 'egfrr' (did you mean 'egfr'?)" in text
    assert f"{p}:line 11: unknown unit 'furlongs' for hba1c; known units: %, mmol/mol." in text
    assert f"{p}:line 22: effective_from 1066-10-14 is outside 1900–2100" in text
    assert f"{p}:line 23: replaces = 'x9' is not a rule id" in text
    load_rules([p])   # scan-level loading accepts local quantities and units


def test_declared_quantities_are_accepted(tmp_path):
    p = tmp_path / "local.toml"
    p.write_text('[[quantity]]\nname = "frailty_index"\nunits = ["points"]\n\n[[rule]]\nid = "f"\n'
                 'quantity = "frailty_index"\nunit = "points"\ncutoff = 0.4\neligible = "above"\n'
                 'source = "invented"\n')
    rules, problems = validate_catalogues([p])
    assert problems == [] and rules[0].quantity == "frailty_index"
    assert "frailty_index" not in QUANTITIES


def test_load_rules_raises_first_problem_with_line(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text(BROKEN)
    with pytest.raises(SpecError, match=r"bad.toml:line 10: duplicate rule id 'a'.*and 5 more problem"):
        load_rules([p])
    q = tmp_path / "baddate.toml"
    q.write_text('[[rule]]\nid = "a"\neffective_from = 2019-02-30\n')
    # tomllib rejects a calendar-impossible TOML date; the error names the line
    with pytest.raises(SpecError, match=r"baddate.toml:line 3: not valid TOML"):
        load_rules([q])


def test_cli_rules_validate(tmp_path):
    ok = run_cli("rules", "validate", *shipped_catalogues())
    assert ok.returncode == 0 and "no errors" in ok.stdout
    p = tmp_path / "broken.toml"
    p.write_text(BROKEN)
    bad = run_cli("rules", "validate", p)
    assert bad.returncode == 2
    assert f"{p}:line 10: duplicate rule id 'a'" in bad.stderr
    assert "problem(s) in 1 catalogue(s)" in bad.stderr


def test_cli_rules_list_filters_by_quantity():
    out = run_cli("rules", "list", "--quantity", "sbp")
    assert out.returncode == 0
    assert "acc-aha-htn-sbp-130" in out.stdout and "kdigo" not in out.stdout
    assert "2017-11-13" in out.stdout
    every = run_cli("rules", "list")
    assert "who-low-birth-weight-2500" in every.stdout and "aca-medicaid-expansion-138" in every.stdout
    miss = run_cli("rules", "list", "--quantity", "egfrr")
    assert miss.returncode == 2 and "did you mean 'egfr'" in miss.stderr


def test_shipped_dir_can_be_overridden(tmp_path, monkeypatch):
    monkeypatch.setenv("CUTSCAN_RULES", str(tmp_path))
    assert shipped_dir() == Path(tmp_path)
