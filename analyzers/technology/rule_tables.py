"""The [rules.*] tables of a technology file: which keys each rule takes, and the
records the structured ones become.

Plain numbers are checked by the model's checker; the tables here add the
structured values of the tap-distance rule (a spacing table, limits near pad
diffusions, a relaxed marked area) and their conversion back to file keys.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

DOUBLE_KINDS = ("ndiff", "pdiff")  # [rules.io-guard-ring] double for one kind of device (the devices table's names)
RULE_KEYS = {
    "tap-distance": ("limit", "limit_n", "limit_p", "by_spacing", "spacing_within",
                     "near_pad_n", "near_pad_p", "relaxed"),
    "tap-contact-distance": ("limit",),
    "io-guard-ring": ("min_width", "max_gap", "double"),
    "io-spacing": ("min",),
}
# The marker layer role of [rules.tap-distance] relaxed.
RELAXED_MARKER = "low_tap_density"
# Within how far (um) of a device the spacing of a by_spacing table is measured when the
# file does not say: GF180MCU's latch-up table measures "within 50um" of the diffusion
# (gf180mcu-pdk design manual, tables_clear/55_Latch-up_152.csv, LU.1-LU.4).
DEFAULT_SPACING_WITHIN = 50.0


@dataclass(frozen=True)
class SpacingLimit:
    """One row of a spacing-dependent tap-distance table, in um."""

    min_spacing: float  # the row applies when the spacing to the opposite well is >= this
    limit: float


@dataclass(frozen=True)
class NearPadLimit:
    """A stricter tap distance (um) for device diffusions of one kind that lie within
    ``within`` um of a pad-connected diffusion of the other kind."""

    within: float
    limit: float


@dataclass(frozen=True)
class RelaxedArea:
    """The tap distance (um) inside the low-tap-density marker, for diffusions the
    marker covers and that lie at least ``pad_clearance`` um from every pad-connected
    diffusion."""

    limit: float
    pad_clearance: float


def check_rules(check, value: Any, layers: dict) -> dict[str, dict[str, object]]:
    """The [rules] table checked key by key; ``check`` is the model's checker, ``layers``
    the declared roles (the relaxed area needs its marker role)."""
    table = check.table(value, "rules")
    check.known_keys(table, "rules", tuple(RULE_KEYS))
    rules = {}
    for rule_id, raw in table.items():
        prefix = f"rules.{rule_id}"
        body = check.table(raw, prefix)
        check.known_keys(body, prefix, RULE_KEYS[rule_id])
        checked: dict[str, object] = {}
        for key, item in body.items():
            where = f"{prefix}.{key}"
            if key == "by_spacing":
                checked[key] = spacing_table(check, item, where)
            elif key in ("near_pad_n", "near_pad_p"):
                checked[key] = NearPadLimit(**_numbers(check, item, where, ("within", "limit")))
            elif key == "relaxed":
                if RELAXED_MARKER not in layers:
                    raise check.fail(where, f"layers.{RELAXED_MARKER} declared (the marked area)", None,
                                     got_text="no such layer")
                checked[key] = RelaxedArea(**_numbers(check, item, where, ("limit", "pad_clearance")))
            elif key == "double":
                # true/false, or one device kind: double rings for pad-connected N+ only, say
                if not isinstance(item, bool) and item not in DOUBLE_KINDS:
                    raise check.fail(where, 'true, false, "ndiff" or "pdiff"', item)
                checked[key] = item
            else:
                checked[key] = check.number(item, where)
        if rule_id == "io-guard-ring":
            checked.setdefault("double", False)
        rules[rule_id] = checked
    return rules


def _numbers(check, value: Any, key: str, names: tuple[str, ...]) -> dict[str, float]:
    row = check.table(value, key)
    check.known_keys(row, key, names)
    return {name: check.number(check.required(row, key, name, "a positive number"), f"{key}.{name}")
            for name in names}


def spacing_table(check, value: Any, key: str) -> tuple[SpacingLimit, ...]:
    """A by_spacing list checked row by row, widest row first."""
    if not isinstance(value, list):
        raise check.fail(key, "a list of {min_spacing, limit} tables", value)
    rows: list[SpacingLimit] = []
    for i, raw in enumerate(value):
        prefix = f"{key}[{i}]"
        row = check.table(raw, prefix)
        check.known_keys(row, prefix, ("min_spacing", "limit"))
        spacing = check.number(check.required(row, prefix, "min_spacing", "a non-negative number"),
                               f"{prefix}.min_spacing", allow_zero=True)
        limit = check.number(check.required(row, prefix, "limit", "a positive number"), f"{prefix}.limit")
        if any(r.min_spacing == spacing for r in rows):
            raise check.fail(f"{prefix}.min_spacing", "a min_spacing no other row uses", raw["min_spacing"])
        rows.append(SpacingLimit(spacing, limit))
    # Files may list rows in any order; first-match lookup needs widest first.
    return tuple(sorted(rows, key=lambda r: r.min_spacing, reverse=True))


def plain_rules(rules) -> dict[str, dict[str, object]]:
    """The checked rule tables as plain file keys (what ``extends`` merges onto)."""
    out = {}
    for rule_id, table in rules.items():
        plain = {}
        for key, value in table.items():
            if key == "by_spacing":
                plain[key] = [asdict(row) for row in value]
            elif isinstance(value, (NearPadLimit, RelaxedArea)):
                plain[key] = asdict(value)
            else:
                plain[key] = value
        out[rule_id] = plain
    return out
