"""What every rule module provides: an id, a default severity, four-part
documentation and one check function."""

from __future__ import annotations

import enum
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from latchwatch.analyzers.model.findings import Finding, Severity


@dataclass(frozen=True)
class RuleDoc:
    """A rule's documentation in four parts: what it flags, why it matters, an example, the fix."""
    flags: str  # what it flags
    why: str  # why it matters (the physics, one paragraph)
    example: str  # a script fragment that triggers it
    fix: str  # how to fix it


class Scope(enum.Enum):
    """What a rule looks at: the run itself (once per run), or each checked top cell's layout."""

    RUN = "run"
    LAYOUT = "layout"


@dataclass(frozen=True)
class Rule:
    """A rule: id, default severity, summary, documentation, scope and its check function."""
    id: str
    severity: Severity
    summary: str  # one line, for `latchwatch rules` and SARIF shortDescription
    doc: RuleDoc
    check: Callable[[object], Iterable[Finding]]  # takes a CheckContext
    scope: Scope = Scope.LAYOUT  # RUN rules see ctx.flat None; LAYOUT rules a flattened top cell

    def help_text(self) -> str:
        d = self.doc
        return (
            f"{self.id} ({self.severity.label})\n\n{self.summary}\n\n"
            f"What it flags\n{d.flags}\n\nWhy it matters\n{d.why}\n\n"
            f"Example\n{d.example}\n\nHow to fix it\n{d.fix}\n"
        )
