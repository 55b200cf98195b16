"""Several runs of one document in the editor: corners merged per anchor line, the
worst corner first (server/lsp/convert.py, diagnostics_for_runs / hover_for_runs)."""

from __future__ import annotations

from dataclasses import replace

from lsprotocol import types

from latchwatch.analyzers.model.findings import Device, Finding, Frame, Severity
from latchwatch.server.lsp import convert as convert

GEN = "/project/fingers.py"
LINES = [
    "import gdstk",
    "def finger_array(fingers=4, w=2.0):",
    "    cell = gdstk.Cell('F')",
    "    box(cell, ACTIVE, 0, 0, fingers * 1.5, w)",
    "    box(cell, NWELL, -4, -1, fingers * 1.5 + 1, w + 1)",
    "    return 1 / (fingers - 1)",
]


def read_line(file, line):
    return LINES[line - 1] if file == GEN and 0 < line <= len(LINES) else None


def tap(value, corner, line=4):
    return Finding(rule="tap-distance", severity=Severity.ERROR,
                   message=f"P+ diffusion is {value:.2f} um from the nearest n-well tap (limit 20.00 um)",
                   file=GEN, line=line, column=5, end_column=46, cell="F", location=(value, 0.0),
                   bbox=(0.0, 0.0, value, 2.0), value=value, limit=20.0, unit="um", corner=corner,
                   stack=(Frame(GEN, line, "finger_array", 5, line, 46),), device_kind="pdiff")


def device(distance, line=4):
    return Device(kind="pdiff", cell="F", bbox=(0.0, 0.0, distance, 2.0), file=GEN, line=line, body="nwell#1",
                  tap_distance_um=distance)


def run(corner, findings=(), devices=(), function="finger_array"):
    return convert.RunFindings(function, corner, tuple(findings), tuple(devices))


def test_one_run_is_converted_as_before():
    finding = tap(25.5, {"fingers": 16})
    alone = convert.diagnostics_for_runs([run({"fingers": 16}, [finding], [device(25.5)])], GEN, read_line)
    before = convert.diagnostics_by_file([finding], [device(25.5)], GEN, read_line)
    assert alone == before


def test_corners_merge_on_the_line_worst_first():
    runs = [run({"fingers": 1, "w": 2.0}, [], [device(3.0)]),
            run({"fingers": 16, "w": 2.0}, [tap(25.5, {"fingers": 16, "w": 2.0})], [device(25.5)]),
            run({"fingers": 20, "w": 2.0}, [tap(31.5, {"fingers": 20, "w": 2.0})], [device(31.5)])]
    (diagnostic,) = convert.diagnostics_for_runs(runs, GEN, read_line)[GEN]
    # w is the same in every corner, so only fingers names the corner.
    assert diagnostic.message == ("at fingers=20, 2 of 3 corners: P+ diffusion is 31.50 um from the nearest "
                                  "n-well tap (limit 20.00 um); also at fingers=16")
    assert diagnostic.severity == types.DiagnosticSeverity.Error
    assert diagnostic.range.start.line == 3
    assert diagnostic.data["runs"] == 2 and diagnostic.data["corner"] == {"fingers": 20, "w": 2.0}


def test_a_corner_that_raises_is_its_own_diagnostic():
    error = Finding(rule="script-error", severity=Severity.ERROR, message="script raised ZeroDivisionError: division by zero",
                    file=GEN, line=6, corner={"fingers": 1}, stack=(Frame(GEN, 6, "finger_array"),))
    runs = [run({"fingers": 1}, [error]), run({"fingers": 4}), run({"fingers": 16}, [tap(25.5, {"fingers": 16})])]
    by_line = {d.range.start.line: d.message for d in convert.diagnostics_for_runs(runs, GEN, read_line)[GEN]}
    assert by_line == {
        3: "at fingers=16, 1 of 3 corners: P+ diffusion is 25.50 um from the nearest n-well tap (limit 20.00 um)",
        5: "at fingers=1, 1 of 3 corners: script raised ZeroDivisionError: division by zero",
    }


def test_counts_within_the_worst_corner_use_its_own_devices():
    # Two diffusions drawn on line 4 at fingers=16, one too far; at fingers=4 both are fine.
    runs = [run({"fingers": 4}, [], [device(5.0), device(6.0)]),
            run({"fingers": 16}, [tap(25.5, {"fingers": 16})], [device(25.5), device(10.0)])]
    (diagnostic,) = convert.diagnostics_for_runs(runs, GEN, read_line)[GEN]
    assert diagnostic.message.startswith("at fingers=16, 1 of 2 corners: 1 of 2 P+ diffusions drawn here: ")


def test_previewed_functions_are_named_by_function():
    other = replace(tap(22.0, {}), line=5)
    runs = [run({}, [tap(21.0, {})], [device(21.0)], function="finger_array"),
            run({}, [other], [device(22.0, line=5)], function="guard_pair")]
    messages = sorted(d.message for d in convert.diagnostics_for_runs(runs, GEN, read_line)[GEN])
    assert messages == ["in finger_array(): P+ diffusion is 21.00 um from the nearest n-well tap (limit 20.00 um)",
                        "in guard_pair(): P+ diffusion is 22.00 um from the nearest n-well tap (limit 20.00 um)"]


def test_hover_shows_the_worst_corner_on_the_line():
    runs = [run({"fingers": 4}, [], [device(7.0)]),
            run({"fingers": 16}, [tap(25.5, {"fingers": 16})], [device(25.5)]),
            run({"fingers": 8}, [], [device(13.0)])]
    text = convert.hover_for_runs(GEN, 4, runs, lambda kind: 20.0)
    head, body = text.split("\n\n", 1)
    assert head == "**at fingers=16**, the worst of 3 corners on this line"
    assert "worst 25.50 um" in body and "(limit 20.00 um)" in body
    # Without findings on the line, the corner with the farthest tap is shown.
    clean = [replace(r, findings=()) for r in runs]
    assert convert.hover_for_runs(GEN, 4, clean, lambda kind: 20.0).startswith("**at fingers=16**")
    assert convert.hover_for_runs(GEN, 2, runs, lambda kind: 20.0) is None
