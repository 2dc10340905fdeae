"""The docs describe the code: docs/spec.md is generated from the spec schema, every warning
kind and plausible range is documented, and the README names no file outside the repository."""
import re
import tomllib
from pathlib import Path

from scanner.quality import KINDS
from scanner.spec import KNOWN, parse_spec
from scanner.spec_schema import KEYS, markdown
from scanner.units import PLAUSIBLE

ROOT = Path(__file__).resolve().parents[1]


def test_spec_reference_is_the_generated_one():
    assert (ROOT / "docs" / "spec.md").read_text(encoding="utf-8") == markdown(), \
        "regenerate with: python -m scanner.spec_schema > docs/spec.md"


def test_every_valid_key_is_documented_with_type_default_and_example():
    documented = {(k.section, k.name) for k in KEYS}
    valid = {(sec, k) for sec, keys in KNOWN.items() for k in keys}
    assert valid == documented
    for k in KEYS:
        assert k.type and k.default and k.example and k.meaning, k


def test_documented_examples_are_valid_spec_lines():
    base = {"running": [{"column": "x"}], "treatments": {"columns": ["d"]}}
    for k in KEYS:
        if k.section == "" or k.example.startswith("[") or _long_format(k):
            continue   # long-format keys: test_long_format_examples_parse
        raw = {**base, "running": [dict(base["running"][0])]}
        value = tomllib.loads(k.example)[k.name]
        if k.section == "running":
            raw["running"][0][k.name] = value
            raw["running"][0].update({"quantity": "hba1c", "unit": "%"} if k.name.startswith("unit_") else {})
            if k.name == "unit_map":
                raw["running"][0]["unit_column"] = "u"
        else:
            raw[k.section] = {k.name: value}
            if k.name == "keep":
                raw["data"].update(unit="p", date="t")
        parse_spec(raw)


def _long_format(k) -> bool:
    from scanner.events.layout import RUNNING_KEYS
    return (k.section in ("events", "events.uptake", "screen")
            or (k.section == "data" and k.name in ("person", "periods", "period_start",
                                                   "period_end", "omop"))
            or (k.section == "running" and k.name in RUNNING_KEYS))


def test_long_format_examples_parse():
    """Every long-format key's example, set in the long-format spec of docs/long-format.md."""
    text = (ROOT / "docs" / "long-format.md").read_text(encoding="utf-8")
    block = text.split("```toml\n", 1)[1].split("```", 1)[0]
    base = tomllib.loads(block)
    assert parse_spec(base).layout.treatments == ("metformin_180d",)
    for k in KEYS:
        if not _long_format(k) or k.example.startswith("["):
            continue
        raw = tomllib.loads(block)
        value = tomllib.loads(k.example)[k.name]
        if k.section == "running":
            raw["running"][0][k.name] = value
            if k.name == "concept":
                raw["data"] = {"omop": "cdm/"}
                raw.pop("events")
                raw["events"] = {"uptake": [{"name": "u", "concepts": [1], "days": [0, 30]}]}
                raw["covariates"] = {"columns": ["age"]}
        elif k.section == "events.uptake":
            raw["events"]["uptake"][0][k.name] = value
        elif k.section == "screen":
            raw["screen"] = {k.name: value}
        elif k.name == "omop":
            raw = {"data": {"omop": value}, "running": [{"concept": 3004410}],
                   "events": {"uptake": [{"name": "u", "concepts": [1], "days": [0, 30]}]}}
        else:
            raw.setdefault(k.section, {})[k.name] = value
        parse_spec(raw)


def test_data_quality_page_lists_every_kind_and_range():
    text = (ROOT / "docs" / "data-quality.md").read_text(encoding="utf-8")
    for kind in KINDS:
        assert f"`{kind}`" in text, kind
    for q in PLAUSIBLE:
        assert re.search(rf"\b{q}\b", text), q
    block = text.split("```toml\n", 1)[1].split("```", 1)[0]
    raw = tomllib.loads(block)
    raw["treatments"] = {"columns": ["statin"]}
    spec = parse_spec(raw)
    assert spec.decimal == "," and spec.running[0].unit_column == "hba1c_unit"


def test_readme_names_no_file_outside_the_repository():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "../" not in text and "shared/" not in text
    for target in re.findall(r"\]\(([^)#]+)\)", text):
        if not target.startswith("http"):
            assert (ROOT / target).exists(), target
    generated = (ROOT / ".gitignore").read_text().split()      # folders the scripts write
    for path in re.findall(r"`((?:docs|rules|examples|benchmarks)/[\w./-]+)`", text):
        assert (ROOT / path).exists() or path in generated, path
