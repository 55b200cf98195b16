"""Suppression comments (docs/suppression.md): parsing, applying along the stack, and the
editor's add-a-comment edit."""

import pytest

from latchwatch.analyzers.model.findings import Finding, Frame, Severity
from latchwatch.server.runs.suppression import add_suppression, apply_suppressions, suppressions_in_source

SOURCE = '''\
import gdstk
cell = gdstk.Cell("ROW")
box(cell, 2, 0, 0, 1, 1)  # latchwatch: ignore[tap-distance]
box(cell, 2, 0, 0, 1, 1)  # latchwatch: ignore
box(cell, 2, 0, 0, 1, 1)  #latchwatch:ignore[ tap-distance ,tap-supply ]
note = "# latchwatch: ignore"
doc = """
text # latchwatch: ignore
"""
box(cell, 2, 0, 0, 1, 1)  # latchwatch: ignore[tap-distance] because reviewed
box(cell, 2, 0, 0, 1, 1)  # noqa: E501  # latchwatch: ignore[floating-well]
box(cell, 2, 0, 0, 1, 1)  # latchwatch: ignore[]
'''


def test_markers_are_found_only_in_comments_at_line_end():
    assert suppressions_in_source(SOURCE) == {
        3: frozenset({"tap-distance"}),
        4: None,
        5: frozenset({"tap-distance", "tap-supply"}),
        # 6 and 8: inside string literals; 10: text after the marker; 12: names no rule
        11: frozenset({"floating-well"}),
    }


def test_source_that_stops_tokenizing_keeps_earlier_markers():
    typing = "a = 1  # latchwatch: ignore\nb = f(2,  # latchwatch: ignore[tap-supply]\n"
    assert suppressions_in_source(typing) == {1: None, 2: frozenset({"tap-supply"})}
    assert suppressions_in_source("") == {}


FILES = {
    "gen.py": "def unit(c):\n    box(c)  # latchwatch: ignore[tap-distance]\n"
              "row(\n    n=3,\n)  # latchwatch: ignore\n"
              "box(c)\nunit(c)  # latchwatch: ignore[tap-supply]\n",
    "helper.py": "def box(c):\n    c.add(shape)\n",
}


def finding(rule, *frames, file=None, line=None):
    stack = tuple(Frame(f, n, "fn", end_line=end) for f, n, end in frames)
    if stack and file is None:
        file, line = stack[0].file, stack[0].line
    return Finding(rule, Severity.ERROR, "m", file=file, line=line, stack=stack)


def test_findings_through_a_suppressing_line_are_dropped():
    findings = [
        finding("tap-distance", ("gen.py", 2, None)),             # anchor line says ignore[tap-distance]
        finding("tap-supply", ("gen.py", 2, None)),               # same line, other rule: kept
        finding("tap-distance", ("helper.py", 2, None), ("gen.py", 5, None)),  # call site: bare ignore
        finding("tap-distance", ("gen.py", 3, 5)),                # call spanning lines 3-5, marker on 5
        finding("tap-distance", ("gen.py", 6, None)),             # no marker: kept
        finding("tap-supply", ("gen.py", 2, None), ("gen.py", 7, None)),  # outer frame ignores tap-supply
        finding("tap-distance", file="gen.py", line=4),           # no stack: the anchor line 4 is inside no marker
        finding("tap-distance", file="gen.py", line=5),           # no stack: anchor on a bare ignore
    ]
    kept = apply_suppressions(findings, FILES.get)
    assert kept == [findings[1], findings[4], findings[6]]


def test_sources_are_read_once_and_unreadable_files_suppress_nothing():
    reads = []

    def read(file):
        reads.append(file)
        return FILES.get(file)

    findings = [finding("tap-distance", ("gen.py", 2, None)) for _ in range(5)]
    findings.append(finding("tap-distance", ("missing.py", 1, None)))
    kept = apply_suppressions(findings, read)
    assert kept == findings[5:]
    assert sorted(reads) == ["gen.py", "missing.py"]


@pytest.mark.parametrize("line, rule, expected", [
    ("box(c, 2)\n", "tap-distance", "box(c, 2)  # latchwatch: ignore[tap-distance]\n"),
    ("box(c, 2)   \r\n", "tap-distance", "box(c, 2)  # latchwatch: ignore[tap-distance]\r\n"),
    ("box(c, 2)", None, "box(c, 2)  # latchwatch: ignore"),
    ("box(c)  # latchwatch: ignore[a]\n", "b", "box(c)  # latchwatch: ignore[a, b]\n"),
    ("box(c)  # latchwatch: ignore[a]\n", "a", "box(c)  # latchwatch: ignore[a]\n"),
    ("box(c)  # latchwatch: ignore[a]\n", None, "box(c)  # latchwatch: ignore\n"),
    ("box(c)  # latchwatch: ignore\n", "b", "box(c)  # latchwatch: ignore\n"),
    ("box(c)  # noqa\n", "b", "box(c)  # noqa  # latchwatch: ignore[b]\n"),
    ("    f(a,\n", "b", "    f(a,  # latchwatch: ignore[b]\n"),
])
def test_add_suppression(line, rule, expected):
    assert add_suppression(line, rule) == expected


def test_added_comment_is_recognised():
    edited = add_suppression(add_suppression("box(c)\n", "tap-distance"), "tap-supply")
    assert suppressions_in_source(edited) == {1: frozenset({"tap-distance", "tap-supply"})}


def test_backslash_continuation_cannot_take_a_comment():
    with pytest.raises(ValueError, match="backslash"):
        add_suppression("x = a + \\\n", "tap-distance")


def test_a_layout_file_is_never_read_for_comments():
    # Suppression comments live in Python source: a finding on a .gds is kept without
    # reading the file (which may be a device or huge).
    read = []
    finding = Finding(rule="tap-distance", severity=Severity.ERROR, message="m", file="/x/top.gds", line=3)
    kept = apply_suppressions([finding], lambda f: read.append(f) or "")
    assert kept == [finding] and read == []
