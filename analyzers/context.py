"""What a rule's check function sees: the run, the technology, the flattened layout
and its extraction (computed once, on first use), and a way to build findings."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np

from latchwatch.analyzers.extraction.extract import Extraction, extract
from latchwatch.analyzers.layout.budget import LayoutBudget
from latchwatch.analyzers.layout.flatten import FlatLayout
from latchwatch.analyzers.layout.provenance import Provenance, is_user_file
from latchwatch.analyzers.model.findings import Finding, Related, Severity

if TYPE_CHECKING:
    from latchwatch.analyzers.model.run_outcome import RunOutcome
from latchwatch.analyzers.technology.model import Technology


@dataclass(frozen=True)
class CheckOptions:
    """How a check is run: which frames are the user's, which top cell, and whether device figures are exact."""
    project_root: str | None = None  # frames under it are user frames
    top: str | None = None  # check this cell as the top
    exact_devices: bool = False  # compute every device's tap distance to 1 nm
    budget: LayoutBudget = LayoutBudget()  # what one top cell may flatten to


class CheckContext:
    """What a rule sees: the run, the technology, the options, one flattened top cell (None for run rules)."""
    def __init__(self, outcome: RunOutcome, tech: Technology, options: CheckOptions,
                 flat: FlatLayout | None = None):
        self.outcome, self.tech, self.options, self.flat = outcome, tech, options, flat
        self._cache: dict = {}

    @cached_property
    def provenance(self) -> Provenance:
        return Provenance(self.flat, self.options.project_root)

    @cached_property
    def extraction(self) -> Extraction:
        return extract(self.flat, self.tech)

    def memo(self, key, compute):
        """Share one computation between rules (for example the tap distances)."""
        if key not in self._cache:
            self._cache[key] = compute()
        return self._cache[key]

    @property
    def script_path(self) -> str:
        return self.outcome.script

    def related_shape(self, shape: int, message: str, location=None) -> Related:
        loc = self.provenance.locate_shape(shape)
        return Related(message, loc["file"], loc["line"], _point(location))

    def related_label(self, label: int, message: str) -> Related:
        loc = self.provenance.locate_label(label)
        return Related(message, loc["file"], loc["line"], _point(self.flat.label_xy[label]))

    def shape_finding(self, rule, shape: int, message: str, **fields) -> Finding:
        """A finding on the line that drew flat shape ``shape``."""
        return self._finding(rule, self.provenance.locate_shape(shape), message, **fields)

    def piece_finding(self, rule, pieces, i: int, message: str, related=(), **fields) -> Finding:
        """A finding on the line that drew most of diffusion piece ``i`` of ``pieces``; the
        other lines that drew parts of it follow the given related information."""
        shape = int(pieces.shape[i])
        anchor = self.provenance.locate_shape(shape)
        seen = {(anchor["file"], anchor["line"])}
        also = []
        others = pieces.drawn_shapes(i)
        # A location is a function of (stack, instance): look each up once, however many
        # shapes a loop drew into one diffusion.
        flat = self.flat
        _, first = np.unique(np.c_[flat.stack[others], flat.instance[others]], axis=0, return_index=True)
        for other in others[np.sort(first)].tolist():
            if other == shape:
                continue
            part = self.related_shape(other, "also drawn here (the same diffusion)")
            if (part.file, part.line) not in seen:
                seen.add((part.file, part.line))
                also.append(part)
        return self._finding(rule, anchor, message, related=(*related, *also), **fields)

    def label_finding(self, rule, label: int, message: str, **fields) -> Finding:
        """A finding on the line that added flat label ``label``, located at the label."""
        fields.setdefault("location", self.flat.label_xy[label])
        return self._finding(rule, self.provenance.locate_label(label), message, **fields)

    def _finding(self, rule, loc: dict, message: str, *, location=None, bbox=None,
                 value=None, limit=None, unit=None, related=(), figures=None, device_kind=None) -> Finding:
        return Finding(
            rule=rule.id, severity=rule.severity, message=message,
            location=_point(location), bbox=_box(bbox), value=_round(value), limit=limit, unit=unit,
            corner=self.outcome.corner, related=tuple(related), figures=figures or {}, device_kind=device_kind, **loc,
        )

    def run_finding(self, rule, message: str, frames=(), **fields) -> Finding:
        """A finding about the run itself, on its innermost user frame (or the script's first line)."""
        user = [f for f in frames if is_user_file(f.file, self.options.project_root)]
        stack = tuple(user)
        top = stack[0] if stack else None
        return Finding(
            rule=rule.id, severity=rule.severity, message=message,
            file=top.file if top else self.script_path, line=top.line if top else 1,
            end_line=(top.end_line or top.line) if top else 1,
            column=top.column if top else None, end_column=top.end_column if top else None,
            stack=stack, corner=self.outcome.corner, **fields,
        )


def _point(p):
    return None if p is None else (round(float(p[0]), 6), round(float(p[1]), 6))


def _box(b):
    return None if b is None else tuple(round(float(v), 6) for v in b)


def _round(v):
    return None if v is None else round(float(v), 6)


__all__ = ["CheckContext", "CheckOptions", "Severity"]
