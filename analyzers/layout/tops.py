"""Which cells of a captured layout are checked as tops, and why.

The layout a script produced is what it names: the cells a called function (or the
script's main()-style entry) returned, else the cells it wrote to a file or showed, else the cells bound to module-level
names; of those, the ones no other named cell references (a named cell inside another
is checked as part of it). A script that names nothing is checked from every cell no
other cell references. Metadata cells (KLayout's context information) are never tops,
and a framework's cached intermediates drop out whenever the script names its layout:
the named top does not reference them. A layout file names nothing: its tops are the
cells no other cell references.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from latchwatch.analyzers.layout.provenance import is_user_file
from latchwatch.analyzers.model.captured import METADATA_CELLS, CapturedLayout

# Named kinds, strongest first: the first tier that names a cell decides.
TIERS = (("returned",), ("written", "shown"), ("assigned",))
REASONS = {
    "option": "named by --top",
    "returned": "returned by {detail}()",
    "written": "written by the script to {detail}",
    "shown": "shown by the script",
    "assigned": "assigned to {detail} at module level",
    "unreferenced": "not referenced by another cell",
}
WRITTEN_NO_FILE = "written by the script"  # a write to something that is no file name (a stream)


@dataclass(frozen=True)
class CheckedTop:
    """A cell checked as a top, with how it was chosen and the line that named it, where known."""
    cell: int  # index into CapturedLayout.cells
    name: str
    how: str  # a key of REASONS
    detail: str = ""
    file: str | None = None
    line: int | None = None

    @property
    def reason(self) -> str:
        if self.how == "written" and not self.detail:
            return WRITTEN_NO_FILE
        return REASONS[self.how].format(detail=self.detail)


def references(layout: CapturedLayout) -> list[np.ndarray]:
    """Per cell, the distinct cells it references directly; a metadata cell references none."""
    return [np.unique(cell.ref_cell) if cell.name not in METADATA_CELLS else np.zeros(0, np.int32)
            for cell in layout.cells]


def reachable(children: list[np.ndarray], starts: np.ndarray) -> np.ndarray:
    """Boolean mask of the cells reached from ``starts`` by one or more references."""
    seen = np.zeros(len(children), dtype=bool)
    frontier = np.unique(np.concatenate([children[i] for i in starts])) if len(starts) else np.zeros(0, np.int64)
    while len(frontier):
        frontier = frontier[~seen[frontier]]
        seen[frontier] = True
        if not len(frontier):
            break
        frontier = np.unique(np.concatenate([children[i] for i in frontier]))
    return seen


def outermost(candidates: list[int], children: list[np.ndarray]) -> list[int]:
    """The candidates no other candidate reaches, in the given order, each once."""
    unique = list(dict.fromkeys(candidates))
    inside = reachable(children, np.asarray(unique, dtype=np.int64))
    return [c for c in unique if not inside[c]]


def choose_tops(layout: CapturedLayout, project_root: str | None = None) -> list[CheckedTop]:
    """The cells to check and why: the strongest naming tier's outermost cells, else every unreferenced cell."""
    children = references(layout)
    metadata = {i for i, cell in enumerate(layout.cells) if cell.name in METADATA_CELLS}
    for tier in TIERS:
        named = [n for n in layout.named if n.how in tier and n.cell not in metadata]
        if not named:
            continue
        first = {}
        for entry in named:
            first.setdefault(entry.cell, entry)
        chosen = outermost([n.cell for n in named], children)
        if chosen:
            return [_named_top(layout, first[c], project_root) for c in chosen]
    return [CheckedTop(i, layout.cells[i].name, "unreferenced") for i in layout.top_cells()]


def _named_top(layout: CapturedLayout, entry, project_root: str | None) -> CheckedTop:
    frames = layout.stack_frames(entry.stack)
    user = next((f for f in frames if is_user_file(f.file, project_root)), None)
    return CheckedTop(entry.cell, layout.cells[entry.cell].name, entry.how, entry.detail,
                      user.file if user else None, user.line if user else None)


def option_top(layout: CapturedLayout, index: int) -> CheckedTop:
    """The cell ``--top`` names."""
    return CheckedTop(index, layout.cells[index].name, "option")
