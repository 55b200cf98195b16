"""script-timeout: the layout script ran past its time limit."""

from __future__ import annotations

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

MESSAGE = "script ran past its time limit and was stopped after {seconds:.1f} s while running this line"


def check(ctx):
    """One finding on the line the script was running when its time ran out."""
    failure = ctx.outcome.failure
    if failure is None or failure.kind != "timeout":
        return
    yield ctx.run_finding(RULE, MESSAGE.format(seconds=ctx.outcome.seconds), failure.frames)


RULE = Rule(
    id="script-timeout",
    severity=Severity.ERROR,
    summary="The script ran past its time limit; the finding sits on the line it was running.",
    doc=RuleDoc(
        flags=(
            "A layout script still running when its time limit (--timeout, or `timeout` in the project "
            "configuration; 10 s by default) expired. Its whole process group is stopped, and the finding is "
            "anchored at the line the script was executing at that moment."
        ),
        why=(
            "A run that never finishes yields no layout to check, and in an editor it would hold the next run "
            "back. Stopping it and saying where it was is the useful outcome."
        ),
        example="while x < width:   # x never grows: an endless loop\n    box(cell, ACTIVE, x, 0, x + 1, 1)",
        fix="Fix the loop, or raise the time limit if the generator is legitimately slow.",
    ),
    check=check,
    scope=Scope.RUN,
)
