"""SARIF 2.1.0 output (docs/sarif.md), validated against the OASIS JSON schema."""

import json
import math
from urllib.parse import urljoin

import pytest

import latchwatch
from latchwatch.analyzers.model.findings import Finding, Frame, Placement, Related, Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc
from latchwatch.server.report.as_sarif import render_sarif
from latchwatch.server.report.model import Report, RunSummary

from locations import DATA

jsonschema = pytest.importorskip("jsonschema")

# The OASIS SARIF 2.1.0 schema, kept beside the project (see standards/README.md).
SCHEMA_FILE = DATA / "sarif-schema-2.1.0.json"  # SARIF 2.1.0 (OASIS), kept so a fresh clone validates


@pytest.fixture(scope="module")
def validator():
    if not SCHEMA_FILE.is_file():
        pytest.skip(f"SARIF 2.1.0 schema not found at {SCHEMA_FILE}")
    schema = json.loads(SCHEMA_FILE.read_text())
    return jsonschema.Draft4Validator(schema)  # the schema declares draft-04


def rule(rule_id, severity):
    doc = RuleDoc(flags=f"{rule_id} flags this", why="because physics", example="box(cell, 1, 0, 0, 1, 1)",
                  fix="add a tap")
    return Rule(rule_id, severity, f"summary of {rule_id}", doc, check=lambda context: ())


RULES = (rule("tap-distance", Severity.ERROR), rule("tap-supply", Severity.WARNING),
         rule("no-geometry", Severity.INFO))


def source_finding(base):
    script = str(base / "cells" / "row.py")
    return Finding(
        "tap-distance", Severity.ERROR, "P+ diffusion is 21.02 um from the nearest n-well tap",
        file=script, line=12, end_line=12, column=5, end_column=30, cell="ROW",
        location=(23.0, 8.0), bbox=(20.0, 8.0, 23.0, 12.0), value=21.02, limit=20.0, unit="um",
        corner={"fingers": 4},
        stack=(Frame(script, 12, "inverter"), Frame(script, 34, "<module>")),
        placements=(Placement(script, 40, "ROW", "UNIT[3,0]"), Placement(None, None, "TOP", "ROW")),
        related=(Related("nearest n-well tap", script, 27, (2.0, 9.0)), Related("pad net", location=(1.0, 1.0))),
    )


def layout_finding():
    return Finding("tap-distance", Severity.ERROR, "far from a tap", file="/data/chip.gds",
                   cell="TOP", location=(5.0, 6.0), value=math.inf)


def full_report(base):
    findings = (
        source_finding(base),
        layout_finding(),
        Finding("script-error", Severity.ERROR, "script raised"),  # not in the catalogue
        Finding("tap-supply", Severity.INFO, "downgraded by configuration", file="a.py", line=1),
    )
    run = RunSummary(str(base / "cells" / "row.py"), None, "ok", 0.2, 3, 40, {"network": "blocked"})
    return Report("demo", (run,), findings, None, RULES)


def sarif(report, base):
    return json.loads(render_sarif(report, base=base))


def results_by_message(log):
    return {r["message"]["text"]: r for r in log["runs"][0]["results"]}


def test_full_report_validates(validator, tmp_path):
    log = sarif(full_report(tmp_path), tmp_path)
    errors = sorted(validator.iter_errors(log), key=str)
    assert not errors, errors[0].message


def test_empty_report_validates(validator, tmp_path):
    log = sarif(Report("demo", (), (), None, ()), tmp_path)
    assert not list(validator.iter_errors(log))
    assert log["version"] == "2.1.0" and len(log["runs"]) == 1 and log["runs"][0]["results"] == []


def test_driver_carries_the_rule_catalogue(tmp_path):
    driver = sarif(full_report(tmp_path), tmp_path)["runs"][0]["tool"]["driver"]
    assert driver["name"] == "latchwatch" and driver["version"] == latchwatch.__version__
    assert [r["id"] for r in driver["rules"]] == ["tap-distance", "tap-supply", "no-geometry"]
    # SARIF 2.1.0 section 3.58.6 (level values): error, warning, note, none.
    assert [r["defaultConfiguration"]["level"] for r in driver["rules"]] == ["error", "warning", "note"]
    first = driver["rules"][0]
    assert first["shortDescription"]["text"] == "summary of tap-distance"
    assert first["fullDescription"]["text"] == "tap-distance flags this"
    for part in ("tap-distance flags this", "because physics", "box(cell, 1, 0, 0, 1, 1)", "add a tap"):
        assert part in first["help"]["text"] and part in first["help"]["markdown"]


def test_result_rule_index_level_and_region(tmp_path):
    log = sarif(full_report(tmp_path), tmp_path)
    rules = log["runs"][0]["tool"]["driver"]["rules"]
    results = results_by_message(log)
    main = results["P+ diffusion is 21.02 um from the nearest n-well tap"]
    assert rules[main["ruleIndex"]]["id"] == main["ruleId"] == "tap-distance"
    assert main["level"] == "error"
    place = main["locations"][0]["physicalLocation"]
    assert place["region"] == {"startLine": 12, "endLine": 12, "startColumn": 5, "endColumn": 30}
    downgraded = results["downgraded by configuration"]
    assert downgraded["level"] == "note"  # the finding's severity, not the rule default
    assert rules[downgraded["ruleIndex"]]["id"] == "tap-supply"
    assert downgraded["locations"][0]["physicalLocation"]["region"]["startColumn"] == 1
    unknown = results["script raised"]
    assert "ruleIndex" not in unknown and unknown["ruleId"] == "script-error"
    assert unknown["locations"] == []


def test_relative_uri_resolves_to_the_file_through_the_base_id(tmp_path):
    log = sarif(full_report(tmp_path), tmp_path)
    run = log["runs"][0]
    artifact = results_by_message(log)["P+ diffusion is 21.02 um from the nearest n-well tap"][
        "locations"][0]["physicalLocation"]["artifactLocation"]
    assert artifact == {"uri": "cells/row.py", "uriBaseId": "%SRCROOT%"}
    base_uri = run["originalUriBaseIds"]["%SRCROOT%"]["uri"]
    assert base_uri.endswith("/")
    assert urljoin(base_uri, artifact["uri"]) == (tmp_path / "cells" / "row.py").as_uri()


def test_layout_finding_uses_the_file_and_a_logical_cell_location(tmp_path):
    result = results_by_message(sarif(full_report(tmp_path), tmp_path))["far from a tap"]
    location = result["locations"][0]
    assert location["physicalLocation"] == {"artifactLocation": {"uri": "file:///data/chip.gds"}}
    assert location["logicalLocations"][0]["name"] == "TOP"
    assert location["properties"]["location"] == [5.0, 6.0]
    assert result["properties"]["value"] is None  # infinite distance: unknown, not "Infinity"


def test_related_locations_from_related_call_sites_and_placements(tmp_path):
    result = results_by_message(sarif(full_report(tmp_path), tmp_path))[
        "P+ diffusion is 21.02 um from the nearest n-well tap"]
    related = result["relatedLocations"]
    assert [r["id"] for r in related] == list(range(len(related)))
    summary = [(r["message"]["text"], r.get("physicalLocation", {}).get("region", {}).get("startLine"))
               for r in related]
    # The anchor frame (line 12) is the result's own location, not a related one; the
    # placement without a source line stays in properties only.
    assert summary == [
        ("nearest n-well tap", 27),
        ("pad net", None),
        ("call site in <module>", 34),
        ("placement UNIT[3,0] of cell ROW", 40),
    ]
    assert related[0]["properties"]["location"] == [2.0, 9.0]


def test_properties_carry_the_figures(tmp_path):
    result = results_by_message(sarif(full_report(tmp_path), tmp_path))[
        "P+ diffusion is 21.02 um from the nearest n-well tap"]
    properties = result["properties"]
    assert {k: properties[k] for k in ("value", "limit", "unit", "cell", "location", "bbox", "corner")} == {
        "value": 21.02, "limit": 20.0, "unit": "um", "cell": "ROW", "location": [23.0, 8.0],
        "bbox": [20.0, 8.0, 23.0, 12.0], "corner": {"fingers": 4},
    }
    assert [p["instance"] for p in properties["placements"]] == ["UNIT[3,0]", "ROW"]


def test_results_follow_the_report_order(tmp_path):
    findings = (Finding("tap-supply", Severity.WARNING, "second", file="b.py", line=1),
                Finding("tap-distance", Severity.ERROR, "first", file="a.py", line=5))
    log = sarif(Report("demo", (), findings, None, RULES), tmp_path)
    assert [r["message"]["text"] for r in log["runs"][0]["results"]] == ["first", "second"]


def test_the_schema_check_is_not_vacuous(validator, tmp_path):
    log = sarif(full_report(tmp_path), tmp_path)
    log["runs"][0]["results"][0]["level"] = "info"  # not a SARIF level
    log["runs"][0]["results"][1]["locations"][0]["physicalLocation"]["region"] = {"startLine": 0}
    assert len(list(validator.iter_errors(log))) >= 2
