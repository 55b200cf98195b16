"""The rule registry: an explicit tuple, in catalogue order (docs/rules.md)."""

from __future__ import annotations

from latchwatch.analyzers.rules import (
    floating_well,
    injection_bias,
    invalid_geometry,
    io_guard_ring,
    io_spacing,
    isolation_tie,
    no_geometry,
    script_error,
    script_limit,
    script_timeout,
    shunt_resistance,
    tap_contact_distance,
    tap_distance,
    tap_supply,
    uncontacted_tap,
)
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

RULES: tuple[Rule, ...] = (
    tap_distance.RULE,
    floating_well.RULE,
    uncontacted_tap.RULE,
    tap_contact_distance.RULE,
    tap_supply.RULE,
    io_guard_ring.RULE,
    io_spacing.RULE,
    isolation_tie.RULE,
    shunt_resistance.RULE,
    injection_bias.RULE,
    script_error.RULE,
    script_timeout.RULE,
    script_limit.RULE,
    invalid_geometry.RULE,
    no_geometry.RULE,
)

RULES_BY_ID = {rule.id: rule for rule in RULES}

__all__ = ["RULES", "RULES_BY_ID", "Rule", "RuleDoc", "Scope"]
