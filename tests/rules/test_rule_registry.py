"""Every rule module is registered, documented in four parts, and in the catalogue."""

import importlib
import pkgutil

import latchwatch.analyzers.rules as rules_pkg
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULE_IDS, RULE_MODULES, RULES, RULES_BY_ID

# docs/rules.md catalogue: id -> default severity (rules of later work are added as they land).
CATALOGUE = {
    "tap-distance": Severity.ERROR, "floating-well": Severity.ERROR, "uncontacted-tap": Severity.WARNING,
    "tap-contact-distance": Severity.ERROR,
    "tap-supply": Severity.WARNING, "io-guard-ring": Severity.ERROR, "io-spacing": Severity.WARNING,
    "isolation-tie": Severity.ERROR, "shunt-resistance": Severity.WARNING,
    "injection-bias": Severity.WARNING, "script-error": Severity.ERROR,
    "script-timeout": Severity.ERROR, "script-limit": Severity.ERROR, "invalid-geometry": Severity.WARNING,
    "no-geometry": Severity.WARNING,
}


def test_every_rule_module_is_registered():
    modules = [m.name for m in pkgutil.iter_modules(rules_pkg.__path__) if m.name != "base"]
    registered = {r.check.__module__.rsplit(".", 1)[1] for r in RULES}
    assert sorted(modules) == sorted(registered)
    for name in modules:
        module = importlib.import_module(f"latchwatch.analyzers.rules.{name}")
        assert module.RULE in RULES


def test_each_id_is_its_module_name_so_the_ids_are_known_before_any_rule_is_imported():
    assert [rule.id for rule in RULES] == list(RULE_IDS)
    assert [rule.check.__module__.rsplit(".", 1)[1] for rule in RULES] == list(RULE_MODULES)


def test_naming_the_rules_imports_none_of_them():
    import subprocess
    import sys

    probe = ("import sys; from latchwatch.analyzers.rules import RULE_IDS; "
             "print(sorted(m for m in sys.modules if m.startswith('latchwatch.analyzers.rules.')), "
             "'shapely' in sys.modules, len(RULE_IDS))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["['latchwatch.analyzers.rules.base']", "False", str(len(RULE_MODULES))]


def test_rules_match_the_catalogue_and_are_documented():
    assert len(RULES_BY_ID) == len(RULES)
    for rule in RULES:
        assert CATALOGUE[rule.id] == rule.severity
        for part in (rule.summary, rule.doc.flags, rule.doc.why, rule.doc.example, rule.doc.fix):
            assert part.strip()
        assert len(rule.doc.why) > 150  # the physics, a paragraph, not a slogan


def test_run_rules_judge_the_run_and_layout_rules_the_layout():
    """A rule's scope decides where check_outcome calls it; the run rules are the four about the run itself."""
    from latchwatch.analyzers.rules import Scope

    run_rules = {rule.id for rule in RULES if rule.scope is Scope.RUN}
    assert run_rules == {"script-error", "script-timeout", "script-limit", "no-geometry"}


def test_each_rule_runs_once_per_run_or_top_cell(monkeypatch):
    from latchwatch.analyzers import check as check_module
    from latchwatch.analyzers.rules import Scope
    from latchwatch.server.config.techfiles import load_technology

    from builders import NWELL, CellBuilder, layout, outcome

    calls = []
    real = check_module._checked
    monkeypatch.setattr(check_module, "_checked", lambda rule, ctx, cell=None: calls.append(
        (rule.id, ctx.flat is None)) or real(rule, ctx, cell))
    one_top = CellBuilder("TOP")
    one_top.rect(NWELL, 0, 0, 10, 10)
    check_module.check_outcome(outcome(layout(one_top)), load_technology("demo"))
    # Once each: run rules without a flattened layout, layout rules on the one top cell.
    assert sorted(calls) == sorted((rule.id, rule.scope is Scope.RUN) for rule in RULES)


def test_the_docs_catalogue_lists_every_rule_with_its_severity_and_scope():
    from locations import ROOT

    rows = {}
    for line in (ROOT / "docs" / "rules.md").read_text(encoding="utf-8").splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0] in RULES_BY_ID:
            rows[cells[0]] = (cells[1], cells[2])
    assert rows == {rule.id: (rule.severity.label, rule.scope.value) for rule in RULES}
