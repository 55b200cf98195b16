"""script-limit: the layout script exceeded a memory, output or process limit."""

from __future__ import annotations

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.model.run_outcome import is_layout_file
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

MESSAGE = "script exceeded a resource limit: {message}"
MESSAGE_LAYOUT = "the layout file exceeds a limit: {message}"
MESSAGE_CHECK = "the layout is too large for latchwatch to check: {message}"


def check(ctx):
    """One finding when the script exceeded a memory, output or process limit."""
    failure = ctx.outcome.failure
    if failure is None or failure.kind != "limit":
        return
    if failure.stage == "check":
        template = MESSAGE_CHECK
    else:
        template = MESSAGE_LAYOUT if is_layout_file(ctx.outcome.script or "") else MESSAGE
    yield ctx.run_finding(RULE, template.format(message=failure.message or failure.exc_type or "limit reached"),
                          failure.frames)


RULE = Rule(
    id="script-limit",
    severity=Severity.ERROR,
    summary="The script exceeded a memory, output or process limit.",
    doc=RuleDoc(
        flags=(
            "A layout script stopped by one of the limits its sandbox sets: address space, CPU time, size of "
            "the captured geometry or of its printed output, or number of processes; or a layout (drawn "
            "or read from a file) that latchwatch's own limits refuse to analyse: more shapes or vertices "
            "once its arrays are expanded than the [limits] budget, more memory or time than the analysis "
            "may take. Where the script was running is known (a MemoryError, the array reference that "
            "expands too far), the finding sits on that line; otherwise on the first line."
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
