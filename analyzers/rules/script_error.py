"""script-error: the layout script raised."""

from __future__ import annotations

from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.model.run_outcome import is_layout_file
from latchwatch.analyzers.rules.base import Rule, RuleDoc, Scope

MESSAGE = "script raised {exc_type}: {message}"
MESSAGE_LAYOUT = "the layout file could not be read: {message}"
MESSAGE_CAPTURE = ("the script ran, but latchwatch failed to capture its layout ({message}); nothing was checked. "
                   "This is a fault in latchwatch: please report it with the script")
MESSAGE_NOT_RAISED = "the script did not run to its end: {message}"  # killed, refused, unreadable


def check(ctx):
    """One finding on the raising line when the script raised."""
    failure = ctx.outcome.failure
    if failure is None or failure.kind != "error":
        return
    if failure.stage == "capture":
        text = MESSAGE_CAPTURE.format(message=failure.message or "no message")
    elif is_layout_file(ctx.outcome.script or ""):
        text = MESSAGE_LAYOUT.format(message=failure.message or "(no message)")
    elif failure.exc_type is None:
        text = MESSAGE_NOT_RAISED.format(message=failure.message or "(no message)")
    else:
        text = MESSAGE.format(exc_type=failure.exc_type, message=failure.message or "(no message)")
    yield ctx.run_finding(RULE, text, failure.frames)


RULE = Rule(
    id="script-error",
    severity=Severity.ERROR,
    summary="The script raised; the finding sits on the raising line in user code.",
    doc=RuleDoc(
        flags=(
            "A layout script that ended with an exception (including a syntax error, or SystemExit with a "
            "non-zero status). The finding is anchored at the innermost frame of the traceback that lies in "
            "your project and carries the exception type and message; the outer frames are listed as call sites. "
            "Also a script that ran but whose layout latchwatch failed to capture (a fault of latchwatch, "
            "reported on the script's first line), so that a failed capture never passes for a clean layout."
        ),
        why=(
            "A generator that fails for some parameter produces no layout, so none of its latch-up defences "
            "can be checked: every other rule is silent for this run, which must not pass for a clean result."
        ),
        example="finger_pitch = width / (fingers - 1)   # ZeroDivisionError when fingers == 1",
        fix="Fix the exception; the other rules run again as soon as the script completes.",
    ),
    check=check,
    scope=Scope.RUN,
)
