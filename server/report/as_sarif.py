"""SARIF 2.1.0 report (docs/sarif.md): one run, the rule catalogue as the driver's rules,
one result per finding.

Paths inside the base folder are written relative, against the uriBaseId
``%SRCROOT%`` whose absolute value is given in ``originalUriBaseIds``; other paths
are absolute file URIs. Finding columns are 1-based, counted in characters (code
points), and ``end_column`` is taken as the column after the last character, as
SARIF's ``endColumn`` is.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from urllib.parse import quote

import latchwatch
from latchwatch.analyzers.model.findings import Finding, Severity
from latchwatch.analyzers.rules.base import Rule
from latchwatch.server.report.as_json import number, placement_to_dict, plain, point, run_to_dict
from latchwatch.server.report.model import Report, for_display

SARIF_VERSION = "2.1.0"
SARIF_SCHEMA_URI = (
    "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
)
SOURCE_ROOT = "%SRCROOT%"

LEVELS = {Severity.ERROR: "error", Severity.WARNING: "warning", Severity.INFO: "note"}


def artifact_location(file: str) -> dict:
    """A SARIF artifactLocation for a file (a file URI when absolute)."""
    if os.path.isabs(file):
        return {"uri": Path(file).as_uri()}
    return {"uri": quote(Path(file).as_posix()), "uriBaseId": SOURCE_ROOT}


def region(line: int, end_line: int | None = None, column: int | None = None,
           end_column: int | None = None) -> dict:
    """A SARIF region from 1-based lines and columns."""
    end_line = end_line if end_line is not None and end_line >= line else line
    area = {"startLine": line, "endLine": end_line, "startColumn": column or 1}
    if end_column is not None and (end_line > line or end_column > area["startColumn"]):
        area["endColumn"] = end_column
    return area


def physical_location(file: str, line: int | None = None, **extent) -> dict:
    """A SARIF physicalLocation of a file and an optional region."""
    place = {"artifactLocation": artifact_location(file)}
    if line is not None:
        place["region"] = region(line, **extent)
    return place


def rule_descriptor(rule: Rule) -> dict:
    """A SARIF reportingDescriptor for a rule, with its documentation as help."""
    doc = rule.doc
    markdown = (
        f"{rule.summary}\n\n**What it flags**\n\n{doc.flags}\n\n**Why it matters**\n\n{doc.why}"
        f"\n\n**Example**\n\n```python\n{doc.example}\n```\n\n**How to fix it**\n\n{doc.fix}\n"
    )
    return {
        "id": rule.id,
        "shortDescription": {"text": rule.summary},
        "fullDescription": {"text": doc.flags},
        "help": {"text": rule.help_text(), "markdown": markdown},
        "defaultConfiguration": {"level": LEVELS[rule.severity]},
    }


def finding_locations(finding: Finding) -> list[dict]:
    """Where the finding is: the source line, or for layout-file input the file plus
    the cell as a logical location."""
    location: dict = {}
    if finding.file is not None:
        location["physicalLocation"] = physical_location(
            finding.file, finding.line, end_line=finding.end_line,
            column=finding.column, end_column=finding.end_column,
        )
    if finding.line is None and finding.cell is not None:
        location["logicalLocations"] = [{"name": finding.cell, "kind": "module"}]
        if finding.location is not None:
            location["properties"] = {"location": point(finding.location)}
    return [location] if location else []


def related_locations(finding: Finding) -> list[dict]:
    """The finding's related places, then the call sites of its stack that are not the
    anchor itself, then the placements that have a source line."""
    places: list[dict] = []

    def add(message: str, file: str | None, line: int | None, **extra) -> None:
        place: dict = {"id": len(places), "message": {"text": message}}
        if file is not None:
            place["physicalLocation"] = physical_location(file, line, **extra)
        places.append(place)

    for related in finding.related:
        add(related.message, related.file, related.line)
        if related.location is not None:
            places[-1]["properties"] = {"location": point(related.location)}
    for frame in finding.stack:
        if (frame.file, frame.line) == (finding.file, finding.line):
            continue
        add(f"call site in {frame.function}", frame.file, frame.line,
            end_line=frame.end_line, column=frame.column, end_column=frame.end_column)
    for placement in finding.placements:
        if placement.file is not None and placement.line is not None:
            add(f"placement {placement.instance} of cell {placement.cell}",
                placement.file, placement.line)
    return places


def result(finding: Finding, rule_index: dict[str, int]) -> dict:
    """A SARIF result for a finding, its figures in properties."""
    entry: dict = {"ruleId": finding.rule}
    if finding.rule in rule_index:
        entry["ruleIndex"] = rule_index[finding.rule]
    entry["level"] = LEVELS[finding.severity]
    entry["message"] = {"text": finding.message}
    entry["locations"] = finding_locations(finding)
    related = related_locations(finding)
    if related:
        entry["relatedLocations"] = related
    properties = {
        "value": number(finding.value),
        "limit": number(finding.limit),
        "unit": finding.unit,
        "cell": finding.cell,
        "location": point(finding.location),
        "bbox": point(finding.bbox),
        "corner": plain(finding.corner),
        "placements": [placement_to_dict(p) for p in finding.placements],
    }
    if finding.figures:
        properties["figures"] = plain(finding.figures)
    entry["properties"] = properties
    return entry


def report_to_sarif(report: Report, *, base: Path | None = None) -> dict:
    """The report as a SARIF 2.1.0 log."""
    shown = for_display(report, base)
    base_folder = Path(os.path.abspath(base if base is not None else os.getcwd()))
    rule_index = {rule.id: index for index, rule in enumerate(shown.rules)}
    run = {
        "tool": {
            "driver": {
                "name": "latchwatch",
                "version": latchwatch.__version__,
                "semanticVersion": latchwatch.__version__,
                "rules": [rule_descriptor(rule) for rule in shown.rules],
            }
        },
        # The trailing slash makes relative URIs resolve inside the folder.
        "originalUriBaseIds": {SOURCE_ROOT: {"uri": base_folder.as_uri().rstrip("/") + "/"}},
        "results": [result(finding, rule_index) for finding in shown.findings],
        "columnKind": "unicodeCodePoints",
        "properties": {
            "technology": shown.technology,
            "runs": [run_to_dict(r) for r in shown.runs],
        },
    }
    return {"$schema": SARIF_SCHEMA_URI, "version": SARIF_VERSION, "runs": [run]}


def render_sarif(report: Report, *, base: Path | None = None) -> str:
    """``base``: the folder ``%SRCROOT%`` stands for (default: the working directory)."""
    return json.dumps(report_to_sarif(report, base=base), indent=2, allow_nan=False) + "\n"
