"""Findings to LSP diagnostics and hovers (server/lsp/convert.py)."""

from __future__ import annotations

from lsprotocol import types
from pygls.uris import from_fs_path

from latchwatch.analyzers.model.findings import Device, Finding, Frame, Placement, Related, Severity
from latchwatch.server.lsp import convert as convert

MAIN, HELPER = "/project/main.py", "/project/helper.py"
SOURCES = {
    MAIN: [
        "import helper",
        "def pmos(cell, x):",
        "    box(cell, PPLUS, x, 0, x + 30, 4)",
        "for i in range(5):",
        "    pmos(cell, i * 40)",
        "helper.strip(cell)",
        "tap(cell)  # the only n-tap",
    ],
    HELPER: ["def strip(cell):", "    cell.add(rect)"],
}


def read_line(file, line):
    lines = SOURCES.get(file, [])
    return lines[line - 1] if 0 < line <= len(lines) else None


def tap_finding(value, location, *, line=3, file=MAIN, stack=None, limit=20.0, bbox=None):
    message = (f"P+ diffusion is {value:.2f} um from the nearest n-well tap (limit {limit:.2f} um)"
               if value is not None else f"P+ diffusion has no contacted n-well tap in its body (limit {limit:.2f} um)")
    return Finding(
        rule="tap-distance", severity=Severity.ERROR, message=message, file=file, line=line, end_line=line,
        column=5, end_column=38, cell="TOP", location=location, bbox=bbox or (location[0], 0.0, location[0] + 30, 4.0),
        value=value, limit=limit, unit="um",
        stack=stack or (Frame(MAIN, 3, "pmos", 5, 3, 38), Frame(MAIN, 5, "<module>", 5, 5, 22)),
        placements=(Placement(MAIN, 7, "TOP", "ROW[2,0]"),),
        related=(Related("nearest n-well tap", MAIN, 7, (1.0, 2.0)),), device_kind="pdiff",
    )


def pdiff(x, line=3, file=MAIN, distance=None):
    return Device(kind="pdiff", cell="TOP", bbox=(x, 0.0, x + 30, 4.0), file=file, line=line, body="nwell#1",
                  tap_distance_um=distance)


def test_columns_in_each_position_encoding():
    # LSP 3.17, "Position": utf-16 counts UTF-16 code units (the default), utf-8 bytes,
    # utf-32 code points. U+1F600 is 4 UTF-8 bytes, 2 UTF-16 units, 1 code point.
    line = "s = '\U0001F600'; box()"
    assert convert.encode_column(line, 8, types.PositionEncodingKind.Utf16) == 9
    assert convert.encode_column(line, 8, types.PositionEncodingKind.Utf8) == 11
    assert convert.encode_column(line, 8, types.PositionEncodingKind.Utf32) == 8
    assert convert.line_length("\u00b5m", types.PositionEncodingKind.Utf8) == 3  # U+00B5 is 2 UTF-8 bytes


def test_range_from_frame_columns_or_whole_line():
    rng = convert.line_range(MAIN, 3, 3, 5, 38, read_line, "utf-16")
    assert (rng.start.line, rng.start.character, rng.end.line, rng.end.character) == (2, 4, 2, 37)
    rng = convert.line_range(MAIN, 5, None, None, None, read_line, "utf-16")
    assert (rng.start.character, rng.end.character) == (4, len("    pmos(cell, i * 40)"))


def test_findings_on_one_line_merge_worst_first():
    findings = [tap_finding(21.0, (21.0, 2.0)), tap_finding(25.5, (65.0, 2.0)), tap_finding(22.25, (105.0, 2.0))]
    devices = [pdiff(f.bbox[0]) for f in findings] + [pdiff(145.0), pdiff(185.0)]
    by_file = convert.diagnostics_by_file(findings, devices, MAIN, read_line, rule_href=lambda r: f"file:///docs/{r}.md")
    assert list(by_file) == [MAIN]
    (diagnostic,) = by_file[MAIN]
    assert diagnostic.message.startswith(
        "3 of 5 P+ diffusions drawn here; worst: P+ diffusion is 25.50 um from the nearest n-well tap (limit 20.00 um)")
    assert diagnostic.message.endswith("others: 22.25, 21.00 um")
    assert diagnostic.severity == types.DiagnosticSeverity.Error
    assert (diagnostic.source, diagnostic.code) == ("latchwatch", "tap-distance")
    assert diagnostic.code_description.href == "file:///docs/tap-distance.md"
    assert diagnostic.range.start.line == 2
    assert diagnostic.data == {"rule": "tap-distance", "line": 3, "count": 3}
    related = {(r.location.range.start.line, r.message) for r in diagnostic.related_information}
    assert (6, "nearest n-well tap at (1.00, 2.00)") in related
    assert (4, "call site in <module>") in related
    assert (6, "placed as ROW[2,0] in TOP") in related
    assert all(r.location.uri == from_fs_path(MAIN) for r in diagnostic.related_information)


def test_missing_tap_counts_as_worst():
    findings = [tap_finding(23.0, (10.0, 1.0)), tap_finding(None, (50.0, 1.0))]
    (diagnostic,) = convert.diagnostics_by_file(findings, [], MAIN, read_line)[MAIN]
    assert "worst: P+ diffusion has no contacted n-well tap" in diagnostic.message
    assert diagnostic.message.endswith("others: 23.00 um")


def test_single_finding_keeps_its_message_and_count():
    finding = tap_finding(21.0, (21.0, 2.0))
    (alone,) = convert.diagnostics_by_file([finding], [pdiff(21.0)], MAIN, read_line)[MAIN]
    assert alone.message == finding.message
    (counted,) = convert.diagnostics_by_file([finding], [pdiff(21.0), pdiff(61.0)], MAIN, read_line)[MAIN]
    assert counted.message == "1 of 2 P+ diffusions drawn here: " + finding.message


def test_different_rules_and_lines_stay_apart():
    other = Finding(rule="uncontacted-tap", severity=Severity.WARNING, message="n-well tap encloses no contact",
                    file=MAIN, line=3, end_line=3)
    diagnostics = convert.diagnostics_by_file([tap_finding(21.0, (1.0, 1.0)), tap_finding(24.0, (5.0, 1.0), line=7), other],
                                              [], MAIN, read_line)[MAIN]
    assert [(d.range.start.line, d.code) for d in diagnostics] == [(2, "tap-distance"), (2, "uncontacted-tap"), (6, "tap-distance")]
    assert diagnostics[1].severity == types.DiagnosticSeverity.Warning


def test_finding_in_another_file_also_shows_at_the_outermost_call():
    stack = (Frame(HELPER, 2, "strip", 5, 2, 19), Frame(MAIN, 6, "<module>", 1, 6, 19))
    finding = tap_finding(30.0, (0.0, 0.0), file=HELPER, line=2, stack=stack)
    by_file = convert.diagnostics_by_file([finding], [], MAIN, read_line)
    assert set(by_file) == {MAIN, HELPER}
    (there,) = by_file[HELPER]
    assert there.range.start.line == 1 and there.message == finding.message
    (here,) = by_file[MAIN]
    assert here.range.start.line == 5 and (here.range.start.character, here.range.end.character) == (0, 18)
    assert here.message == "drawn at helper.py:2 through this call: " + finding.message
    assert any(r.location.uri == from_fs_path(HELPER) and r.message.startswith("drawn here:")
               for r in here.related_information)


def test_no_findings_clears_the_document():
    assert convert.diagnostics_by_file([], [], MAIN, read_line) == {MAIN: []}


def test_notice_spans_the_first_line():
    diagnostic = convert.notice("not trusted", line_text="import helper\n")
    assert (diagnostic.range.start.line, diagnostic.range.end.character) == (0, len("import helper"))
    assert diagnostic.severity == types.DiagnosticSeverity.Information and diagnostic.source == "latchwatch"


def test_hover_describes_the_devices_of_the_line():
    devices = [pdiff(0.0, distance=12.5), pdiff(40.0, distance=21.0), pdiff(80.0, distance=None),
               Device("ndiff", "TOP", (0, 10, 5, 12), MAIN, 5, "psub", 3.0)]
    text = convert.hover_markdown(MAIN, 3, devices, [tap_finding(21.0, (60.0, 2.0))], lambda kind: 20.0)
    assert "**3 P+ diffusions** drawn on this line" in text
    assert "nearest n-well tap: worst 21.00 um, best 12.50 um (limit 20.00 um)" in text
    assert "1 with no contacted n-well tap" in text
    assert "3 without a shunt estimate" in text  # the Device rows above carry no shunt figures
    assert "1 finding here: tap-distance" in text
    assert "N+" not in text
    assert convert.hover_markdown(MAIN, 4, devices, [], lambda kind: 20.0) is None
