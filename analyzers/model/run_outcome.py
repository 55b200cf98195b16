"""The record of one script run: how it ended, what it drew, what it printed."""

from __future__ import annotations

from dataclasses import dataclass

from latchwatch.analyzers.model.captured import CapturedLayout
from latchwatch.analyzers.model.findings import Frame

# Run statuses. "cancelled" marks a run stopped on request (a newer edit superseded
# it); it is not a failure of the script and yields no finding.
STATUSES = ("ok", "error", "timeout", "limit", "cancelled")
FAILURE_KINDS = ("error", "timeout", "limit", "cancelled")
# What a run reads instead of running: layout files, by suffix (lower case).
LAYOUT_SUFFIXES = (".gds", ".gds2", ".gdsii", ".oas", ".oasis")


def is_layout_file(path: str) -> bool:
    """True for a GDSII or OASIS file name (read, not run)."""
    return path.lower().endswith(LAYOUT_SUFFIXES)


@dataclass(frozen=True)
class ScriptFailure:
    """Why a run produced no layout: an exception, a timeout or a limit, with the frames it happened in."""
    kind: str  # "error" | "timeout" | "limit" | "cancelled"
    exc_type: str | None  # e.g. "ZeroDivisionError", "MemoryError"; None when nothing was raised
    message: str
    # Innermost first: for an error, the traceback; for a timeout, the stack the
    # script was executing when it was stopped. Every frame, user or not.
    frames: tuple[Frame, ...] = ()
    # "script" for what happened in the sandboxed run; "capture" when the script ran but
    # latchwatch's capture of its layout failed; "check" for a limit latchwatch's own check
    # of the layout met (the layout budget, the analysis's memory or time).
    stage: str = "script"

    def __post_init__(self):
        if self.stage not in ("script", "capture", "check"):
            raise ValueError(f"ScriptFailure.stage must be script, capture or check, got {self.stage!r}")
        if self.kind not in FAILURE_KINDS:
            raise ValueError(f"ScriptFailure.kind must be one of {', '.join(FAILURE_KINDS)}, got {self.kind!r}")


@dataclass(frozen=True)
class RunOutcome:
    """The pure record of one run: status, captured layout or failure, output and the sandbox report."""
    script: str  # the path as given
    status: str  # one of STATUSES
    seconds: float
    layout: CapturedLayout | None  # None unless status == "ok"
    failure: ScriptFailure | None  # None when status == "ok"
    output: str  # the script's stdout and stderr, capped, with a note of what was dropped
    sandbox: dict  # docs/report-json.md run "sandbox" entry: only protections really applied
    corner: dict | None = None

    def __post_init__(self):
        if self.status not in STATUSES:
            raise ValueError(f"RunOutcome.status must be one of {', '.join(STATUSES)}, got {self.status!r}")
        if (self.status == "ok") != (self.layout is not None):
            raise ValueError(f"RunOutcome for {self.script}: a layout comes with status 'ok' only")
        if (self.status == "ok") != (self.failure is None):
            raise ValueError(f"RunOutcome for {self.script}: status {self.status!r} needs a failure record"
                             if self.status != "ok" else f"RunOutcome for {self.script}: ok run with a failure")

    @property
    def ok(self) -> bool:
        return self.status == "ok"
