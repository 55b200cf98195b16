"""The pipeline after a run: flatten each top cell, extract, apply the rules."""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING

from latchwatch.analyzers.context import CheckContext, CheckOptions
from latchwatch.analyzers.extraction.devices import device_table
from latchwatch.analyzers.layout.budget import LayoutTooLarge, check_budget
from latchwatch.analyzers.layout.flatten import MAX_DEPTH, HierarchyError, flatten
from latchwatch.analyzers.layout.tops import CheckedTop, choose_tops, option_top
from latchwatch.analyzers.model.captured import METADATA_CELLS
from latchwatch.analyzers.model.errors import TopCellError
from latchwatch.analyzers.model.findings import Device, Finding, Severity
from latchwatch.analyzers.model.run_outcome import ScriptFailure
from latchwatch.analyzers.rules import RULES, Rule, Scope

if TYPE_CHECKING:
    from latchwatch.analyzers.model.run_outcome import RunOutcome
from latchwatch.analyzers.technology.model import Technology

DEFAULT_OPTIONS = CheckOptions()


INCOMPLETE = ("latchwatch could not complete this check{where}: {error} (at {place}). This is a fault in "
              "latchwatch, not a verdict on the layout; the other rules ran. Please report it with the script")


@dataclass
class CheckResult:
    """What one run's check found: its findings, its device rows (with --devices) and what it covered."""
    findings: list[Finding]
    devices: list[Device] | None
    cells: int
    shapes: int  # shapes checked, after flattening every top cell
    tops: list[CheckedTop]  # the cells checked as tops, and why
    status: str = "ok"  # the run's status, "limit" when the layout was over the budget
    # What ``on_top`` returned for each checked top, in order (the page's drawings).
    per_top: list = field(default_factory=list)


def select_rules(select: Iterable[str] | None = None, ignore: Iterable[str] = (),
                 disable: Iterable[str] = ()) -> tuple[Rule, ...]:
    """The registered rules left after --select, --ignore and the project's disable list, in catalogue order."""
    chosen = set(select) if select else None
    dropped = set(ignore) | set(disable)
    return tuple(r for r in RULES if (chosen is None or r.id in chosen) and r.id not in dropped)


def checked_tops(outcome: RunOutcome, top: str | None, project_root: str | None = None) -> list[CheckedTop]:
    """The cells to check: the one named by --top, else the layout the script named (analyzers/layout/tops.py)."""
    layout = outcome.layout
    if top is None:
        tops = choose_tops(layout, project_root)
        if not tops and any(cell.name not in METADATA_CELLS for cell in layout.cells):
            names = ", ".join(sorted(c.name for c in layout.cells if c.name not in METADATA_CELLS))
            raise HierarchyError(f"{outcome.script}: every cell is referenced by another, so none is a top: "
                                 f"the references form a cycle (cells: {names})")
        return tops
    index = layout.cell_index(top)
    if index is None:
        names = ", ".join(sorted(c.name for c in layout.cells)) or "none"
        raise TopCellError(f"{outcome.script}: no cell named {top!r} (cells: {names})")
    return [option_top(layout, index)]


def check_outcome(outcome: RunOutcome, tech: Technology, options: CheckOptions = DEFAULT_OPTIONS, *,
                  rules: tuple[Rule, ...] = RULES, severity: dict[str, Severity] | None = None,
                  want_devices: bool = False,
                  on_top: Callable[[CheckContext, list[Finding]], object] | None = None) -> CheckResult:
    """Every chosen rule on one run: run rules once, layout rules on each checked top cell.
    ``on_top`` sees each checked top's context (its flat layout and extraction) with the
    findings of its layout rules, before the context is dropped; what it returns is kept
    in ``per_top`` (pictures use it)."""
    findings: list[Finding] = []
    devices: list[Device] | None = [] if want_devices else None
    run_rules = tuple(rule for rule in rules if rule.scope is Scope.RUN)
    layout_rules = tuple(rule for rule in rules if rule.scope is Scope.LAYOUT)
    layout = outcome.layout
    tops = checked_tops(outcome, options.top, options.project_root) if outcome.status == "ok" and layout is not None else []
    try:  # every top is counted before any is flattened: nothing is checked of a layout over the budget
        for top in tops:
            check_budget(layout, top.cell, options.budget, MAX_DEPTH)
    except LayoutTooLarge as error:
        outcome, tops = over_budget(outcome, error), []
    ctx = CheckContext(outcome, tech, options)
    for rule in run_rules:
        findings.extend(_checked(rule, ctx))
    shapes = 0
    per_top = []
    for top in tops:
        flat = flatten(layout, top.cell, options.budget)
        shapes += flat.shape_count
        ctx = CheckContext(outcome, tech, options, flat)
        found = [f for rule in layout_rules for f in _checked(rule, ctx, top.name)]
        findings.extend(found)
        if on_top is not None:
            per_top.append(on_top(ctx, found))
        if want_devices:
            devices.extend(device_table(ctx))
    if severity:
        findings = [f.with_severity(severity[f.rule]) if f.rule in severity else f for f in findings]
    return CheckResult(
        findings=sorted(_unique(findings), key=Finding.sort_key), devices=devices,
        cells=len(layout.cells) if layout else 0, shapes=shapes, tops=tops, status=outcome.status,
        per_top=per_top,
    )


def over_budget(outcome: RunOutcome, error: LayoutTooLarge) -> RunOutcome:
    """The run as a limit failure (script-limit reports it), on the line that drew the culprit."""
    frames = outcome.layout.stack_frames(error.stack)
    failure = ScriptFailure("limit", None, str(error), frames, stage="check")
    return replace(outcome, status="limit", layout=None, failure=failure)


def _checked(rule: Rule, ctx: CheckContext, cell: str | None = None) -> list[Finding]:
    """The rule's findings; if the rule itself fails, one error finding saying so, so that
    a fault in one rule neither hides the others' findings nor passes a gate silently."""
    try:
        return list(rule.check(ctx))
    except Exception as error:  # noqa: BLE001 - any fault of a rule is reported, not raised
        import traceback

        frame = traceback.extract_tb(error.__traceback__)[-1]
        place = f"{os.path.basename(frame.filename)} line {frame.lineno}"
        where = f" on cell {cell}" if cell else ""
        message = INCOMPLETE.format(where=where, error=f"{type(error).__name__}: {error}", place=place)
        return [ctx.run_finding(rule, message, cell=cell).with_severity(Severity.ERROR)]


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
