"""Every rule module is registered, documented in four parts, and in the catalogue."""

import importlib
import pkgutil

import latchwatch.analyzers.rules as rules_pkg
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULES, RULES_BY_ID

# DESIGN 5.7 catalogue: id -> default severity (rules of later work are added as they land).
CATALOGUE = {
    "tap-distance": Severity.ERROR, "floating-well": Severity.ERROR, "uncontacted-tap": Severity.WARNING,
    "tap-supply": Severity.WARNING, "io-guard-ring": Severity.ERROR, "io-spacing": Severity.WARNING,
    "isolation-tie": Severity.ERROR, "shunt-resistance": Severity.WARNING, "script-error": Severity.ERROR,
    "script-timeout": Severity.ERROR, "script-limit": Severity.ERROR, "invalid-geometry": Severity.WARNING,
    "no-geometry": Severity.INFO,
}


def test_every_rule_module_is_registered():
    modules = [m.name for m in pkgutil.iter_modules(rules_pkg.__path__) if m.name != "base"]
    registered = {r.check.__module__.rsplit(".", 1)[1] for r in RULES}
    assert sorted(modules) == sorted(registered)
    for name in modules:
        module = importlib.import_module(f"latchwatch.analyzers.rules.{name}")
        assert module.RULE in RULES


def test_rules_match_the_catalogue_and_are_documented():
    assert len(RULES_BY_ID) == len(RULES)
    for rule in RULES:
        assert CATALOGUE[rule.id] == rule.severity
        for part in (rule.summary, rule.doc.flags, rule.doc.why, rule.doc.example, rule.doc.fix):
            assert part.strip()
        assert len(rule.doc.why) > 150  # the physics, a paragraph, not a slogan
