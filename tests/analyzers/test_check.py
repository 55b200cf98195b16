"""analyzers/check.py: a rule that fails reports that it could not decide, and the
other rules still report (a fault in one rule must neither hide findings nor pass a
gate silently)."""

from __future__ import annotations

from dataclasses import replace

from latchwatch.analyzers.check import check_outcome
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULES
from latchwatch.server.config.techfiles import load_technology

from builders import ACTIVE, NWELL, PPLUS, CellBuilder, layout, outcome


def _rule(rule_id):
    return next(r for r in RULES if r.id == rule_id)


def _broken(rule_id):
    def check(ctx):
        if ctx.flat is not None:
            raise ZeroDivisionError("float division by zero")
        return iter(())

    return replace(_rule(rule_id), check=check)


def test_a_failing_rule_is_an_error_finding_and_the_other_rules_still_report():
    # A P+ diffusion in an n-well with no tap at all: floating-well (docs/rules.md).
    cell = CellBuilder("TOP").rect(NWELL, -1, -1, 6, 3).rect(PPLUS, 0, 0, 5, 2).rect(ACTIVE, 0, 0, 5, 2)
    rules = (_broken("shunt-resistance"), _rule("floating-well"))
    result = check_outcome(outcome(layout(cell)), load_technology("demo"), rules=rules)
    by_rule = {f.rule: f for f in result.findings}
    assert set(by_rule) == {"shunt-resistance", "floating-well"}
    broken = by_rule["shunt-resistance"]
    assert broken.severity is Severity.ERROR  # the rule's default is a warning: failing closed
    assert broken.cell == "TOP" and broken.line == 1
    assert "could not complete this check on cell TOP: ZeroDivisionError: float division by zero" in broken.message
    assert "test_check.py line" in broken.message and "not a verdict on the layout" in broken.message
