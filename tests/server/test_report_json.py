"""JSON report "latchwatch-report/1": keys, order and values as docs/report-json.md states."""

import json
import math

import numpy as np

import latchwatch
from latchwatch.analyzers.model.findings import Device, Finding, Frame, Placement, Related, Severity
from latchwatch.server.report.as_json import render_json, report_to_dict
from latchwatch.server.report.model import Report, RunSummary

MESSAGE = "P+ diffusion is 21.02 um from the nearest n-well tap (limit 20.00 um)"

# The example document of docs/report-json.md, transcribed (summary aside: the
# example's counts are illustrative and do not match its single finding).
CONTRACT_EXAMPLE = {
    "schema": "latchwatch-report/1",
    "tool": {"name": "latchwatch", "version": "0.1.0"},
    "technology": "demo180",
    "runs": [{"script": "examples/row.py", "corner": None, "status": "ok",
              "seconds": 0.21, "cells": 3, "shapes": 412,
              "sandbox": {"network": "blocked", "writes": "confined", "limits": ["cpu", "memory"]}}],
    "findings": [{
        "rule": "tap-distance", "severity": "error",
        "message": MESSAGE,
        "file": "examples/row.py", "line": 12, "end_line": 12,
        "cell": "ROW", "location": [23.0, 8.0], "bbox": [20.0, 8.0, 23.0, 12.0],
        "value": 21.02, "limit": 20.0, "unit": "um",
        "corner": None,
        "stack": [{"file": "examples/row.py", "line": 12, "function": "inverter"},
                  {"file": "examples/row.py", "line": 34, "function": "<module>"}],
        "placements": [{"file": "examples/row.py", "line": 40, "cell": "ROW", "instance": "UNIT[3,0]"}],
        "related": [{"file": "examples/row.py", "line": 27, "message": "nearest n-well tap",
                     "location": [2.0, 9.0]}],
    }],
    "devices": [{"kind": "pdiff", "cell": "ROW", "bbox": [20.0, 8.0, 23.0, 12.0],
                 "file": "examples/row.py", "line": 12, "body": "nwell#1",
                 "tap_distance_um": 21.02, "shunt_ohm": 23500.0, "trigger_current_a": 2.98e-05}],
}


def example_report(devices=True):
    finding = Finding(
        "tap-distance", Severity.ERROR, MESSAGE, file="examples/row.py", line=12, end_line=12,
        cell="ROW", location=(23.0, 8.0), bbox=(20.0, 8.0, 23.0, 12.0),
        value=21.02, limit=20.0, unit="um",
        stack=(Frame("examples/row.py", 12, "inverter"), Frame("examples/row.py", 34, "<module>")),
        placements=(Placement("examples/row.py", 40, "ROW", "UNIT[3,0]"),),
        related=(Related("nearest n-well tap", "examples/row.py", 27, (2.0, 9.0)),),
    )
    device = Device("pdiff", "ROW", (20.0, 8.0, 23.0, 12.0), "examples/row.py", 12, "nwell#1",
                    21.02, 23500.0, 2.98e-05)
    run = RunSummary("examples/row.py", None, "ok", 0.21, 3, 412,
                     {"network": "blocked", "writes": "confined", "limits": ["cpu", "memory"]})
    return Report("demo180", (run,), (finding,), (device,) if devices else None, ())


def test_design_example_is_reproduced_key_for_key_in_order(tmp_path):
    document = report_to_dict(example_report(), base=tmp_path)
    expected = dict(CONTRACT_EXAMPLE, tool={"name": "latchwatch", "version": latchwatch.__version__})
    # The devices table gained "net" and "corner" after the design's example (backward-compatible keys, last).
    expected["devices"] = [dict(row, net=None, corner=None) for row in CONTRACT_EXAMPLE["devices"]]
    # Runs gained "tops" (the cells checked, and why) after it, last as well.
    expected["runs"] = [dict(row, tops=[]) for row in CONTRACT_EXAMPLE["runs"]]
    summary = document.pop("summary")
    assert document == expected
    # Key order is part of the contract (docs/report-json.md lists it); dict equality ignores it.
    assert list(document) == list(expected)
    assert list(document["findings"][0]) == list(expected["findings"][0])
    assert list(document["runs"][0]) == list(expected["runs"][0])
    assert list(document["devices"][0]) == list(expected["devices"][0])
    assert list(document["findings"][0]["related"][0]) == list(expected["findings"][0]["related"][0])
    assert summary == {"error": 1, "warning": 0, "info": 0}


def test_summary_is_last_and_counts_every_severity(tmp_path):
    findings = tuple(Finding(rule, severity, "m", file="a.py", line=n)
                     for n, (rule, severity) in enumerate(
                         [("tap-distance", Severity.ERROR), ("tap-supply", Severity.WARNING),
                          ("tap-supply", Severity.WARNING), ("no-geometry", Severity.INFO)], start=1))
    document = report_to_dict(Report("demo", (), findings, None, ()), base=tmp_path)
    assert list(document)[-1] == "summary"
    assert document["summary"] == {"error": 1, "warning": 2, "info": 1}


def test_devices_key_only_when_the_table_was_asked_for(tmp_path):
    assert "devices" not in report_to_dict(example_report(devices=False), base=tmp_path)
    empty_table = Report("demo", (), (), (), ())
    assert report_to_dict(empty_table, base=tmp_path)["devices"] == []


def test_unknown_values_are_null(tmp_path):
    bare = Finding("floating-well", Severity.ERROR, "no tap", file="chip.gds", cell="TOP")
    entry = report_to_dict(Report("demo", (), (bare,), None, ()), base=tmp_path)["findings"][0]
    for key in ("line", "end_line", "location", "bbox", "value", "limit", "unit", "corner"):
        assert entry[key] is None, key
    assert entry["stack"] == [] and entry["placements"] == [] and entry["related"] == []


def test_end_line_falls_back_to_line():
    one_line = Finding("tap-distance", Severity.ERROR, "m", file="a.py", line=5)
    assert report_to_dict(Report("demo", (), (one_line,), None, ()))["findings"][0]["end_line"] == 5


def test_non_finite_and_numpy_values_give_valid_json(tmp_path):
    finding = Finding("tap-distance", Severity.ERROR, "no tap reachable", file="a.py", line=1,
                      value=math.inf, limit=np.float64(20.0), location=(np.float64(1.5), np.float32(2.0)),
                      corner={"fingers": np.int64(4)})
    text = render_json(Report("demo", (), (finding,), None, ()), base=tmp_path)
    entry = json.loads(text)["findings"][0]  # strict parse: would fail on Infinity
    assert entry["value"] is None
    assert entry["limit"] == 20.0 and entry["location"] == [1.5, 2.0]
    assert entry["corner"] == {"fingers": 4}


def test_findings_sorted_by_file_line_rule_location(tmp_path):
    findings = (
        Finding("tap-distance", Severity.ERROR, "m", file="b.py", line=1),
        Finding("tap-distance", Severity.ERROR, "m", file="a.py", line=3, location=(5.0, 0.0)),
        Finding("tap-distance", Severity.ERROR, "m", file="a.py", line=3, location=(1.0, 0.0)),
        Finding("floating-well", Severity.ERROR, "m", file="a.py", line=3),
        Finding("tap-supply", Severity.WARNING, "m", file="a.py", line=2),
    )
    entries = report_to_dict(Report("demo", (), findings, None, ()), base=tmp_path)["findings"]
    assert [(e["file"], e["line"], e["rule"], e["location"]) for e in entries] == [
        ("a.py", 2, "tap-supply", None),
        ("a.py", 3, "floating-well", None),
        ("a.py", 3, "tap-distance", [1.0, 0.0]),
        ("a.py", 3, "tap-distance", [5.0, 0.0]),
        ("b.py", 1, "tap-distance", None),
    ]


def test_paths_relative_to_the_working_directory_when_inside(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    script = tmp_path / "cells" / "row.py"
    finding = Finding("tap-distance", Severity.ERROR, "m", file=str(script), line=2,
                      stack=(Frame(str(script), 2, "f"), Frame("/outside/x.py", 9, "<module>")),
                      related=(Related("tap", str(script), 4),))
    run = RunSummary(str(script), None, "ok", 0.1, 1, 1, {})
    document = report_to_dict(Report("demo", (run,), (finding,), None, ()))
    entry = document["findings"][0]
    assert entry["file"] == "cells/row.py"
    assert [f["file"] for f in entry["stack"]] == ["cells/row.py", "/outside/x.py"]
    assert entry["related"][0]["file"] == "cells/row.py"
    assert document["runs"][0]["script"] == "cells/row.py"


def test_render_json_is_the_dict_as_json(tmp_path):
    report = example_report()
    text = render_json(report, base=tmp_path)
    assert text.endswith("\n")
    assert json.loads(text) == report_to_dict(report, base=tmp_path)


def test_run_names_the_function_a_corner_called():
    from latchwatch.server.report.as_json import run_to_dict
    from latchwatch.server.report.model import RunSummary

    plain_run = RunSummary("a.py", None, "ok", 0.1, 1, 4, {})
    called = RunSummary("a.py", {"fingers": 16}, "ok", 0.1, 1, 4, {}, function="finger_array")
    assert "function" not in run_to_dict(plain_run)  # the docs/report-json.md keys, unchanged
    assert run_to_dict(called)["function"] == "finger_array"
