"""The rule registry: an explicit tuple, in catalogue order (docs/rules.md).

The registry names each rule's module; a rule's id is its module's name with dashes
(tests/rules/test_rule_registry.py holds every RULE to it). So the ids are known
without importing a rule, and a command line can check ``--select`` and start its
scripts while the rules, with numpy, shapely and scipy behind them, are still being
imported: ``RULES`` and ``RULES_BY_ID`` import the modules on first use.
"""

from __future__ import annotations

import importlib

from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

RULE_MODULES: tuple[str, ...] = (
    "tap_distance",
    "floating_well",
    "uncontacted_tap",
    "tap_contact_distance",
    "tap_supply",
    "io_guard_ring",
    "io_spacing",
    "isolation_tie",
    "shunt_resistance",
    "injection_bias",
    "script_error",
    "script_timeout",
    "script_limit",
    "invalid_geometry",
    "no_geometry",
)

RULE_IDS: tuple[str, ...] = tuple(name.replace("_", "-") for name in RULE_MODULES)


def __getattr__(name: str):
    """``RULES`` (the Rule records in registry order) and ``RULES_BY_ID``, imported once on first use."""
    if name not in ("RULES", "RULES_BY_ID"):
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    rules = tuple(importlib.import_module(f"{__name__}.{module}").RULE for module in RULE_MODULES)
    globals().update(RULES=rules, RULES_BY_ID={rule.id: rule for rule in rules})
    return globals()[name]


__all__ = ["RULES", "RULES_BY_ID", "RULE_IDS", "RULE_MODULES", "Rule", "RuleDoc", "Scope"]
