"""script-limit: the layout script exceeded a memory, output or process limit."""

from __future__ import annotations

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

MESSAGE = "script exceeded a resource limit: {message}"


def check(ctx):
    """One finding when the script exceeded a memory, output or process limit."""
    failure = ctx.outcome.failure
    if failure is None or failure.kind != "limit":
        return
    yield ctx.run_finding(RULE, MESSAGE.format(message=failure.message or failure.exc_type or "limit reached"),
                          failure.frames)


RULE = Rule(
    id="script-limit",
    severity=Severity.ERROR,
    summary="The script exceeded a memory, output or process limit.",
    doc=RuleDoc(
        flags=(
            "A layout script stopped by one of the limits its sandbox sets: address space, CPU time, size of "
            "the captured geometry or of its printed output, or number of processes. Where the script was "
            "running is known (a MemoryError, say), the finding sits on that line; otherwise on the first line."
        ),
        why=(
            "The limits keep a runaway generator from exhausting the machine, the editor with it; a run that "
            "hit one produced no complete layout, so nothing else about it can be trusted."
        ),
        example="pts = [(x, 0) for x in range(10**10)]   # exhausts memory",
        fix="Reduce what the script allocates or prints; for really large layouts check a smaller parameter set.",
    ),
    check=check,
    scope=Scope.RUN,
)
