"""Text report: GNU-style finding lines (docs/command-line.md) and the summary line."""

import re

from latchwatch.analyzers.model.findings import Finding, Severity
from latchwatch.server.report.as_text import render_text
from latchwatch.server.report.model import Report, RunSummary

# The GNU "file:line:column: severity: message" form compilers print and editors
# (compilation buffers, quickfix lists) parse; common practice.
GNU_LINE = re.compile(r"^(?P<file>[^:\n]+):(?P<line>\d+):(?P<col>\d+): (?P<severity>error|warning|info): "
                      r"(?P<message>.*) \[(?P<rule>[a-z0-9-]+)\]$")

MESSAGE = "P+ diffusion is 21.02 um from the nearest n-well tap (limit 20.00 um)"


def run(script="examples/row.py", corner=None):
    return RunSummary(script, corner, "ok", 0.21, 3, 412, {"network": "blocked"})


def report(*findings, runs=None):
    return Report("demo", tuple(runs or [run()]), tuple(findings), None, ())


def lines_of(text):
    return text.splitlines()


def test_design_example_line_exactly(tmp_path):
    # docs/command-line.md gives this line verbatim; the column is unknown, so 1.
    finding = Finding("tap-distance", Severity.ERROR, MESSAGE, file="examples/row.py", line=12)
    first = lines_of(render_text(report(finding), base=tmp_path))[0]
    assert first == f"examples/row.py:12:1: error: {MESSAGE} [tap-distance]"


def test_known_column_and_every_severity_parse_as_gnu_lines(tmp_path):
    findings = [
        Finding("tap-distance", Severity.ERROR, "a", file="a.py", line=3, column=9),
        Finding("tap-supply", Severity.WARNING, "b", file="a.py", line=4),
        Finding("no-geometry", Severity.INFO, "c", file="a.py", line=5),
    ]
    printed = lines_of(render_text(report(*findings), base=tmp_path))[:3]
    parsed = [GNU_LINE.match(line).groupdict() for line in printed]
    assert [(p["line"], p["col"], p["severity"], p["rule"]) for p in parsed] == [
        ("3", "9", "error", "tap-distance"),
        ("4", "1", "warning", "tap-supply"),
        ("5", "1", "info", "no-geometry"),
    ]


def test_layout_file_finding_names_cell_and_coordinates(tmp_path):
    finding = Finding("floating-well", Severity.ERROR, "n-well holds a P+ diffusion but no tap",
                      file="chip.gds", cell="TOP", location=(23.0, 8.5))
    first = lines_of(render_text(report(finding), base=tmp_path))[0]
    assert first == ("chip.gds: error: n-well holds a P+ diffusion but no tap "
                     "(cell TOP at 23.00, 8.50) [floating-well]")
    assert GNU_LINE.match(first) is None  # no line: editors must not invent one


def test_finding_without_file_is_prefixed_with_the_program_name(tmp_path):
    finding = Finding("script-error", Severity.ERROR, "script raised ValueError")
    assert lines_of(render_text(report(finding), base=tmp_path))[0] == (
        "latchwatch: error: script raised ValueError [script-error]"
    )


def test_corner_is_shown_before_the_rule_id(tmp_path):
    finding = Finding("tap-distance", Severity.ERROR, "far", file="f.py", line=2,
                      corner={"fingers": 16, "w": 0.5})
    first = lines_of(render_text(report(finding), base=tmp_path))[0]
    assert first == "f.py:2:1: error: far (corner fingers=16, w=0.5) [tap-distance]"


def test_multiline_message_stays_on_one_line(tmp_path):
    finding = Finding("script-error", Severity.ERROR, "Traceback\n  boom", file="s.py", line=1)
    printed = lines_of(render_text(report(finding), base=tmp_path))
    assert len(printed) == 2  # the finding and the summary
    assert printed[0] == "s.py:1:1: error: Traceback boom [script-error]"


def test_paths_inside_base_print_relative_and_outside_stay_absolute(tmp_path):
    inside = tmp_path / "cells" / "row.py"
    outside = "/elsewhere/lib.py"
    findings = [
        Finding("tap-distance", Severity.ERROR, "x", file=str(inside), line=7),
        Finding("tap-distance", Severity.ERROR, "y", file=outside, line=8),
    ]
    printed = lines_of(render_text(report(*findings), base=tmp_path))
    assert printed[0] == "/elsewhere/lib.py:8:1: error: y [tap-distance]"
    assert printed[1] == "cells/row.py:7:1: error: x [tap-distance]"


def test_findings_are_sorted_by_file_line_rule(tmp_path):
    findings = [
        Finding("tap-supply", Severity.WARNING, "m", file="b.py", line=1),
        Finding("tap-distance", Severity.ERROR, "m", file="a.py", line=9),
        Finding("tap-supply", Severity.WARNING, "m", file="a.py", line=2),
        Finding("floating-well", Severity.ERROR, "m", file="a.py", line=2),
    ]
    printed = lines_of(render_text(report(*findings), base=tmp_path))[:4]
    keys = [(m["file"], m["line"], m["rule"]) for m in map(GNU_LINE.match, printed)]
    assert keys == [("a.py", "2", "floating-well"), ("a.py", "2", "tap-supply"),
                    ("a.py", "9", "tap-distance"), ("b.py", "1", "tap-supply")]


def test_summary_line_counts_and_does_not_look_like_a_finding(tmp_path):
    findings = [
        Finding("tap-distance", Severity.ERROR, "m", file="a.py", line=1),
        Finding("tap-supply", Severity.WARNING, "m", file="a.py", line=2),
        Finding("tap-supply", Severity.WARNING, "m", file="b.py", line=2),
    ]
    runs = [run("a.py"), run("b.py")]
    last = lines_of(render_text(report(*findings, runs=runs), base=tmp_path))[-1]
    assert last == "1 error, 2 warnings in 2 files"
    assert GNU_LINE.match(last) is None


def test_summary_with_no_findings_and_with_corners(tmp_path):
    runs = [run("f.py", {"n": n}) for n in (1, 4, 16)]
    assert render_text(report(runs=runs), base=tmp_path) == "no findings in 1 file (3 runs)\n"
    info = Finding("no-geometry", Severity.INFO, "empty", file="f.py", line=1)
    assert lines_of(render_text(report(info, runs=runs[:1]), base=tmp_path))[-1] == "1 info in 1 file"
    assert render_text(Report("demo", (), (), None, ()), base=tmp_path) == "no findings\n"


def test_the_checked_line_names_each_top_and_why_capped_and_matches_no_finding_form(tmp_path):
    from dataclasses import replace

    from latchwatch.analyzers.layout.tops import CheckedTop

    written = CheckedTop(0, "TOP", "written", "top.gds", str(tmp_path / "gen.py"), 9)
    many = tuple(CheckedTop(i, f"C{i}", "unreferenced") for i in range(12))
    runs = [replace(run(str(tmp_path / "gen.py")), tops=(written,)), replace(run(str(tmp_path / "lib.gds")), tops=many),
            replace(run(str(tmp_path / "sweep.py"), corner={"n": 2}), function="cell", tops=(
                CheckedTop(0, "CELL", "returned", "cell"),))]
    lines = lines_of(render_text(report(runs=runs), base=tmp_path))
    assert lines[0] == "checked gen.py: TOP (written by the script to top.gds, line 9)"
    assert lines[1] == ("checked lib.gds: " + "; ".join(f"C{i} (not referenced by another cell)" for i in range(10))
                        + "; and 2 more")
    assert lines[2] == "checked sweep.py [cell: n=2]: CELL (returned by cell())"
    assert not any(GNU_LINE.match(line) or re.match(r"^[^:\s]+: (error|warning|info): ", line) for line in lines[:3])
