"""How big a hierarchy becomes when flattened, counted before anything is allocated.

An array reference of 32767 x 32767 is a few bytes in a file or a payload and a
billion shapes once flattened; arrays of arrays multiply. The count here works on
per-cell totals (placements of each cell under the top, level by level, one bincount
over every reference of every cell per level), so it costs the same whatever the
layout expands to, and a layout over the budget is refused with a finding that says
how big it is, which reference makes it so and how to raise the limit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from latchwatch.analyzers.model.captured import CapturedLayout

TOO_LARGE = "the layout under cell {cell} expands to {count} {what}, above the limit of {limit:,}"


@dataclass(frozen=True)
class LayoutBudget:
    """The most shapes and vertices one top cell may flatten to; the hints say how to raise each."""
    shapes: int = 10_000_000
    vertices: int = 50_000_000
    shapes_hint: str = ""
    vertices_hint: str = ""


class LayoutTooLarge(ValueError):
    """A top cell expands beyond the budget; ``stack`` is the stack id of the reference
    or polygon that contributes the most (-1 when none is known)."""

    def __init__(self, cell: str, what: str, count: float, limit: int, hint: str, stack: int):
        self.cell, self.what, self.count, self.limit, self.hint, self.stack = cell, what, count, limit, hint, stack
        text = TOO_LARGE.format(cell=cell, count=_count(count), what=what, limit=limit)
        super().__init__(text + (f"; {hint}" if hint else ""))


def _count(value: float) -> str:
    return f"{int(value):,}" if value < 1e18 else "more than 10^18"


@dataclass(frozen=True)
class _References:
    """Every reference of every cell as flat arrays."""
    parent: np.ndarray  # cell holding the reference
    child: np.ndarray  # cell it places
    copies: np.ndarray  # float64: copies it stands for (an array's columns x rows, or its explicit offsets)
    stack: np.ndarray  # its stack id


def _references(captured: CapturedLayout) -> _References:
    parents, children, copies, stacks = [], [], [], []
    for index, cell in enumerate(captured.cells):
        if not cell.reference_count:
            continue
        explicit = np.diff(cell.ref_explicit_offsets).astype(np.float64)
        lattice = np.maximum(cell.ref_columns, 1).astype(np.float64) * np.maximum(cell.ref_rows, 1)
        parents.append(np.full(cell.reference_count, index))
        children.append(np.asarray(cell.ref_cell, dtype=np.int64))
        copies.append(np.where(explicit > 0, explicit, lattice))
        stacks.append(np.asarray(cell.ref_stack, dtype=np.int64))
    if not parents:
        empty = np.zeros(0, dtype=np.int64)
        return _References(empty, empty, np.zeros(0), empty)
    return _References(*(np.concatenate(a) for a in (parents, children, copies, stacks)))


def placements(captured: CapturedLayout, top: int, max_depth: int) -> np.ndarray:
    """How many times each cell is placed under ``top`` (float64; ``top`` itself once)."""
    refs = _references(captured)
    n = len(captured.cells)
    level = np.zeros(n)
    level[top] = 1.0
    total = level.copy()
    with np.errstate(over="ignore", invalid="ignore"):
        for _ in range(max_depth):
            level = np.bincount(refs.child, weights=level[refs.parent] * refs.copies, minlength=n)
            if not level.any():
                break
            total += level
    return total


def check_budget(captured: CapturedLayout, top: int, budget: LayoutBudget, max_depth: int) -> None:
    """Raise LayoutTooLarge when ``top`` flattens to more shapes or vertices than ``budget`` allows."""
    total = placements(captured, top, max_depth)
    polygons = np.array([cell.polygon_count for cell in captured.cells], dtype=np.float64)
    points = np.array([len(cell.points) for cell in captured.cells], dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):
        shapes, vertices = float(total @ polygons), float(total @ points)
    name = captured.cells[top].name
    if not shapes <= budget.shapes:  # NaN from inf * 0 counts as over
        raise LayoutTooLarge(name, "shapes", _finite(shapes), budget.shapes, budget.shapes_hint,
                             _culprit(captured, total, polygons, max_depth, per_polygon=None))
    if not vertices <= budget.vertices:
        raise LayoutTooLarge(name, "vertices", _finite(vertices), budget.vertices, budget.vertices_hint,
                             _culprit(captured, total, points, max_depth, per_polygon=total))


def _finite(value: float) -> float:
    return value if np.isfinite(value) else float("inf")


def _culprit(captured: CapturedLayout, total: np.ndarray, own: np.ndarray, max_depth: int,
             per_polygon: np.ndarray | None) -> int:
    """Stack id of what adds the most: a reference (its placements x copies x what one
    copy holds) or, for vertices, one polygon (its vertices x its cell's placements)."""
    refs = _references(captured)
    best, stack = -1.0, -1
    with np.errstate(over="ignore", invalid="ignore"):
        if len(refs.child):
            held = own.copy()  # what one placement of each cell holds, itself and below
            for _ in range(max_depth):
                held = own + np.bincount(refs.parent, weights=refs.copies * held[refs.child], minlength=len(own))
            adds = np.nan_to_num(total[refs.parent] * refs.copies * held[refs.child], nan=np.inf)
            r = int(np.argmax(adds))
            best, stack = float(adds[r]), int(refs.stack[r])
        if per_polygon is not None:
            for index, cell in enumerate(captured.cells):
                if cell.polygon_count and per_polygon[index] > 0:
                    sizes = np.diff(cell.poly_offsets)
                    k = int(np.argmax(sizes))
                    if sizes[k] * per_polygon[index] > best:
                        best, stack = float(sizes[k] * per_polygon[index]), int(cell.poly_stack[k])
    return stack
