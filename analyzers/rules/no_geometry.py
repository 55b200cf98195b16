"""no-geometry: the script ran and drew nothing on the technology's layers."""

from __future__ import annotations

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope
from latchwatch.analyzers.technology.derived import pairs as named_pairs

MESSAGE = "script ran but drew no shapes on the layers of technology {tech}"


def check(ctx):
    """One finding when a run that succeeded drew nothing on the technology's layers."""
    layout = ctx.outcome.layout
    if ctx.outcome.status != "ok" or layout is None:
        return
    known = {tuple(v) for v in ctx.tech.layers.values()}
    for expr in ctx.tech.derived.values():  # L/D layers a derived role names directly
        known |= named_pairs(expr)
    for cell in layout.cells:
        pairs = set(zip(cell.poly_layer.tolist(), cell.poly_datatype.tolist(), strict=False)) if cell.polygon_count else set()
        if pairs & known:
            return
    yield ctx.run_finding(RULE, MESSAGE.format(tech=ctx.tech.name))


RULE = Rule(
    id="no-geometry",
    severity=Severity.INFO,
    summary="The script ran and produced no shapes on the technology's layers.",
    doc=RuleDoc(
        flags=(
            "A script that completed but whose cells hold no polygon on any layer the technology declares: "
            "it drew nothing, drew on other layer numbers, or only defines functions. Nothing was checked."
        ),
        why=(
            "Silence from a checker should mean the layout is clean, not that there was no layout. Layer "
            "numbers that do not match the technology file are a common reason, and would hide every "
            "latch-up finding."
        ),
        example="cell.add(gdstk.rectangle((0, 0), (1, 1), layer=99))   # not a layer of the technology",
        fix="Check that the script draws on the technology's layer numbers (latchwatch tech show NAME).",
    ),
    check=check,
    scope=Scope.RUN,
)
