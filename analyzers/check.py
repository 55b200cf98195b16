"""The pipeline after a run: flatten each top cell, extract, apply the rules."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Iterable

from .context import CheckContext, CheckOptions
from .devices import device_table
from .findings import Device, Finding, Severity
from .flatten import flatten
from .rules import RULES, Rule
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from .run_outcome import RunOutcome
from .technology import Technology


class TopCellError(ValueError):
    """--top names a cell the layout does not have."""


@dataclass
class CheckResult:
    findings: list[Finding]
    devices: list[Device] | None
    cells: int
    shapes: int  # shapes checked, after flattening every top cell


def select_rules(select: Iterable[str] | None = None, ignore: Iterable[str] = (),
                 disable: Iterable[str] = ()) -> tuple[Rule, ...]:
    chosen = set(select) if select else None
    dropped = set(ignore) | set(disable)
    return tuple(r for r in RULES if (chosen is None or r.id in chosen) and r.id not in dropped)


def top_cells(outcome: RunOutcome, top: str | None) -> list[int]:
    layout = outcome.layout
    if top is None:
        return layout.top_cells()
    index = layout.cell_index(top)
    if index is None:
        names = ", ".join(sorted(c.name for c in layout.cells)) or "none"
        raise TopCellError(f"{outcome.script}: no cell named {top!r} (cells: {names})")
    return [index]


def check_outcome(outcome: RunOutcome, tech: Technology, options: CheckOptions = CheckOptions(), *,
                  rules: tuple[Rule, ...] = RULES, severity: dict[str, Severity] | None = None,
                  want_devices: bool = False) -> CheckResult:
    findings: list[Finding] = []
    devices: list[Device] | None = [] if want_devices else None
    ctx = CheckContext(outcome, tech, options)
    for rule in rules:
        findings.extend(rule.check(ctx))
    layout = outcome.layout
    shapes = 0
    if outcome.status == "ok" and layout is not None:
        for top in top_cells(outcome, options.top):
            flat = flatten(layout, top)
            shapes += len(flat.polygons)
            ctx = CheckContext(outcome, tech, options, flat)
            for rule in rules:
                findings.extend(rule.check(ctx))
            if want_devices:
                devices.extend(device_table(ctx))
    if severity:
        findings = [f.with_severity(severity[f.rule]) if f.rule in severity else f for f in findings]
    return CheckResult(
        findings=sorted(_unique(findings), key=Finding.sort_key), devices=devices,
        cells=len(layout.cells) if layout else 0, shapes=shapes,
    )


def _unique(findings: list[Finding]) -> list[Finding]:
    """Drop repeats (a shared cell under two top cells reports on the same line twice)."""
    seen, out = set(), []
    for f in findings:
        key = (f.rule, f.file, f.line, f.cell, f.message, f.location)
        if key not in seen:
            seen.add(key)
            out.append(f)
    return out


__all__ = ["CheckOptions", "CheckResult", "TopCellError", "check_outcome", "select_rules", "replace"]
