"""The one model of a finding, and the records it points at.

A rule never formats output: it builds ``Finding`` records, and the front ends
(text, JSON, SARIF, LSP) convert them.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field, replace


class Severity(enum.IntEnum):
    """How serious a finding is; ordered, so a threshold compares with >=."""
    INFO = 1
    WARNING = 2
    ERROR = 3

    @property
    def label(self) -> str:
        return self.name.lower()

    @classmethod
    def parse(cls, text: str) -> Severity:
        try:
            return cls[text.upper()]
        except KeyError:
            raise ValueError(f"expected one of error, warning, info, got {text!r}") from None


@dataclass(frozen=True)
class Frame:
    """One Python frame of the stack that created a shape (lines and columns 1-based)."""

    file: str
    line: int
    function: str
    column: int | None = None
    end_line: int | None = None
    end_column: int | None = None


@dataclass(frozen=True)
class Placement:
    """A reference placement on the way from the top cell down to a shape."""

    file: str | None
    line: int | None
    cell: str
    instance: str


@dataclass(frozen=True)
class Related:
    """A second place worth showing beside a finding (the nearest tap, a call site)."""

    message: str
    file: str | None = None
    line: int | None = None
    location: tuple[float, float] | None = None


@dataclass(frozen=True)
class Finding:
    """One finding: rule, severity, message, anchor, figures and where it was drawn; immutable."""
    rule: str
    severity: Severity
    message: str
    file: str | None = None
    line: int | None = None
    end_line: int | None = None
    column: int | None = None
    end_column: int | None = None
    cell: str | None = None
    location: tuple[float, float] | None = None
    bbox: tuple[float, float, float, float] | None = None
    value: float | None = None
    limit: float | None = None
    unit: str | None = None
    corner: dict | None = None
    stack: tuple[Frame, ...] = ()
    placements: tuple[Placement, ...] = ()
    related: tuple[Related, ...] = ()
    device_kind: str | None = None  # "pdiff" or "ndiff" when the finding is about device diffusions
    # Extra figures for front ends (hover, SARIF properties); never part of identity.
    figures: dict = field(default_factory=dict, compare=False, hash=False)

    def with_severity(self, severity: Severity) -> Finding:
        return replace(self, severity=severity)

    def sort_key(self):
        """docs/report-json.md order: file, line, rule, then location."""
        return (
            self.file or "",
            self.line if self.line is not None else 0,
            self.rule,
            self.location or (0.0, 0.0),
        )


@dataclass(frozen=True)
class Device:
    """One row of the per-device table (docs/report-json.md, ``--devices``)."""

    kind: str  # "pdiff" (P+ device diffusion in an n-well) or "ndiff" (N+ in the p-body)
    cell: str | None
    bbox: tuple[float, float, float, float]
    file: str | None
    line: int | None
    body: str
    tap_distance_um: float | None
    shunt_ohm: float | None = None
    trigger_current_a: float | None = None
    net: str | None = None  # names of the labelled nets its terminals are on, comma-separated
    corner: dict | None = None  # the parameter corner of the run it came from (issue 7)
    # Injectors (pad-connected diffusions) only: where their injected current goes
    # (docs/report-json.md; analyzers/electrical/trigger.py, Injection.record).
    injection: dict | None = field(default=None, compare=False, hash=False)
