"""A fixture per rule: tests/rules/fixtures/<rule>.py is a complete script that fires the rule.

Each fixture marks the line a finding must sit on with ``# fires: <rule> [<rule> ...]``;
the test runs them all through the command, once, and holds each fixture to exactly the
findings its marks declare: the rule fires, on that line, and nothing else does."""

from __future__ import annotations

import json
import re
import subprocess
import sys

import pytest

from latchwatch.analyzers.rules import RULES

from locations import TESTS

FIXTURES = TESTS / "rules" / "fixtures"
MARK = re.compile(r"#\s*fires:\s*(?P<rules>[a-z-]+(?:\s+[a-z-]+)*)\s*$")


def fixture_path(rule_id: str):
    return FIXTURES / f"{rule_id.replace('-', '_')}.py"


def declared(path) -> set[tuple[str, int]]:
    marks = set()
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        match = MARK.search(line)
        if match:
            marks |= {(rule, number) for rule in match["rules"].split()}
    return marks


@pytest.fixture(scope="module")
def findings_by_file():
    paths = [str(fixture_path(rule.id)) for rule in RULES]
    result = subprocess.run(
        [sys.executable, "-m", "latchwatch", "check", "--tech", "demo", "--timeout", "3",
         "--format", "json", "--fail-on", "never", *paths],
        capture_output=True, text=True, timeout=300, cwd=FIXTURES)
    assert result.returncode == 0, result.stderr
    found: dict[str, set[tuple[str, int]]] = {}
    for finding in json.loads(result.stdout)["findings"]:
        found.setdefault(finding["file"], set()).add((finding["rule"], finding["line"]))
    return found


def test_every_rule_has_a_fixture_that_declares_it():
    for rule in RULES:
        path = fixture_path(rule.id)
        assert path.is_file(), f"no fixture for {rule.id}: {path}"
        assert rule.id in {r for r, _ in declared(path)}, f"{path.name} declares no '# fires: {rule.id}'"


@pytest.mark.parametrize("rule_id", [rule.id for rule in RULES])
def test_the_fixture_fires_its_rule_on_the_marked_line_and_nothing_else(rule_id, findings_by_file):
    path = fixture_path(rule_id)
    assert findings_by_file.get(path.name, set()) == declared(path)
