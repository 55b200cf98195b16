"""Which source line a finding points at (docs/provenance.md).

User frames are frames in files under the project root, outside site-packages and
the standard library. The anchor of a shape is its innermost user frame whose line is
layer-specific: every shape created through that line lies on one layer. A generic
drawing helper, whose lines draw on every layer, is thereby skipped for its caller.
A shape of a cell that a cell factory made once and handed out again (gdsfactory's
``@gf.cell`` cache) is published, where it was brought in by another call, on that call.
"""

from __future__ import annotations

import os
import sysconfig
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from latchwatch.analyzers.model.findings import Frame, Placement

if TYPE_CHECKING:  # the flattened layout's module brings shapely and scipy: not needed to name user files
    from latchwatch.analyzers.layout.flatten import FlatLayout

_LIBRARY_DIRS = tuple(
    os.path.normcase(os.path.realpath(p)) + os.sep
    for key in ("stdlib", "platstdlib", "purelib", "platlib")
    if (p := sysconfig.get_paths().get(key))
)


def is_user_file(path: str, project_root: str | None) -> bool:
    """True for a file of the user's own code: under the project root, outside site-packages and the standard library."""
    if not path or path.startswith("<"):
        return False
    norm = os.path.normcase(os.path.realpath(path))
    parts = norm.split(os.sep)
    if "site-packages" in parts or "dist-packages" in parts:
        return False
    if project_root is not None:
        root = os.path.normcase(os.path.realpath(project_root)) + os.sep
        return norm.startswith(root)
    return not norm.startswith(_LIBRARY_DIRS)


@dataclass(frozen=True)
class Anchor:
    """The line a finding is published on and the user frames from it outwards."""
    frame: Frame | None  # the line a finding is published on
    stack: tuple[Frame, ...]  # user frames from the anchor outwards


def _unique_rows(*columns: np.ndarray) -> np.ndarray:
    """The distinct rows of the given columns, sorted; one lexsort (np.unique with axis=0
    sorts a structured view, several times slower on a million rows).

    >>> _unique_rows(np.array([2, 1, 2]), np.array([5, 7, 5])).tolist()
    [[1, 7], [2, 5]]
    """
    rows = np.column_stack(columns)
    rows = rows[np.lexsort(columns[::-1])]
    keep = np.r_[True, (rows[1:] != rows[:-1]).any(axis=1)] if len(rows) else np.zeros(0, bool)
    return rows[keep]


class Provenance:
    """Anchors and placements of the shapes of one flattened layout."""

    def __init__(self, flat: FlatLayout, project_root: str | None):
        self.flat, self.captured = flat, flat.captured
        self.root = project_root
        self._user = {}
        self._stack_cache: dict[tuple[int, bool], Anchor] = {}
        self._line_layers = self._layers_per_line(flat)

    def _is_user(self, frame: Frame) -> bool:
        hit = self._user.get(frame.file)
        if hit is None:
            hit = self._user[frame.file] = is_user_file(frame.file, self.root)
        return hit

    def _layers_per_line(self, flat: FlatLayout) -> dict[tuple[str, int], set]:
        """For each (file, line), the layers of all shapes created through it."""
        layers: dict[tuple[str, int], set] = {}
        if len(flat.stack) == 0:
            return layers
        for stack_id, layer, datatype in _unique_rows(flat.stack, flat.layer, flat.datatype).tolist():
            for frame in self.captured.stack_frames(stack_id):
                layers.setdefault((frame.file, frame.line), set()).add((layer, datatype))
        return layers

    def _layer_specific(self, frame: Frame) -> bool:
        return len(self._line_layers.get((frame.file, frame.line), ())) == 1

    def anchor(self, stack_id: int, layer_specific: bool = True) -> Anchor:
        key = (int(stack_id), layer_specific)
        if key not in self._stack_cache:
            user = [f for f in self.captured.stack_frames(int(stack_id)) if self._is_user(f)]
            pick = 0
            if layer_specific:
                for i, f in enumerate(user):
                    if self._layer_specific(f):
                        pick = i
                        break
            frames = tuple(user[pick:])
            self._stack_cache[key] = Anchor(frames[0] if frames else None, frames)
        return self._stack_cache[key]

    def _placement_chain(self, instance: int) -> list[tuple[Placement, Anchor]]:
        """The reference placements from the top cell down to a flat instance, arrays named with
        column and row, each with the anchor of the line that made it."""
        out = []
        cells = self.captured.cells
        inst = self.flat.instances
        for child, parent_cell in placement_chain(self.flat, instance):
            cell = cells[parent_cell]
            ref = int(inst.ref[child])
            name = cells[int(inst.cell[child])].name
            explicit = cell.ref_explicit_offsets[ref + 1] > cell.ref_explicit_offsets[ref]
            if explicit:
                name = f"{name}[{inst.column[child]}]"
            elif cell.ref_columns[ref] * cell.ref_rows[ref] > 1:
                name = f"{name}[{inst.column[child]},{inst.row[child]}]"
            a = self.anchor(int(cell.ref_stack[ref]), layer_specific=False)
            placement = Placement(a.frame.file if a.frame else None, a.frame.line if a.frame else None, cell.name, name)
            out.append((placement, a))
        return out

    def _reused_cell_anchor(self, anchor: Anchor, chain: list[tuple[Placement, Anchor]]) -> Anchor:
        """The anchor of one occurrence of a shape that a call into a cell factory drew.

        A factory that caches its cells (gdsfactory's ``@gf.cell``) draws a cell once, on
        the first call that asks for it, and hands the same cell to every later call: the
        shape's stack names that first call. Where the shape's line drew several layers (a
        call into a factory, not a line that draws this shape) and a placement on this
        occurrence's path was made by another line of a function on the shape's stack, a
        sibling call brought the cached cell in here: that line is the occurrence's anchor.
        """
        frame = anchor.frame
        if frame is None or self._layer_specific(frame):
            return anchor
        drawn_on = {(f.file, f.function): f.line for f in anchor.stack}
        for _placement, placed in reversed(chain):  # innermost placement first
            where = placed.frame
            if where is not None and drawn_on.get((where.file, where.function), where.line) != where.line:
                return placed
        return anchor

    def locate_shape(self, shape: int) -> dict:
        """Finding fields (file, line, stack, placements, cell) for a flat shape."""
        chain = self._placement_chain(int(self.flat.instance[shape]))
        return self._locate(self._reused_cell_anchor(self.anchor(int(self.flat.stack[shape])), chain), chain)

    def locate_shapes(self, shapes: np.ndarray) -> list[dict]:
        """locate_shape of each shape; shapes drawn by the same stack in the same placement
        share one answer (a row of a thousand devices drawn by one line asks once)."""
        shapes = np.asarray(shapes, dtype=np.int64)
        if len(shapes) == 0:
            return []
        pairs = np.column_stack([self.flat.instance[shapes], self.flat.stack[shapes]]).astype(np.int64)
        _, first, which = np.unique(pairs, axis=0, return_index=True, return_inverse=True)
        answers = [self.locate_shape(int(shapes[i])) for i in first]
        return [answers[k] for k in which.ravel().tolist()]

    def locate_label(self, label: int) -> dict:
        """Finding fields for a flat label: the line that added it."""
        return self._locate(self.anchor(int(self.flat.label_stack[label]), layer_specific=False),
                            self._placement_chain(int(self.flat.label_instance[label])))

    def _locate(self, anchor: Anchor, chain: list[tuple[Placement, Anchor]]) -> dict:
        placements = tuple(placement for placement, _anchor in chain)
        frame = anchor.frame
        file = frame.file if frame else None
        line = frame.line if frame else None
        if frame is None:
            # A shape with no user frame (read from a layout file): publish on the
            # innermost placement that has a line, if any.
            for p in reversed(placements):
                if p.line is not None:
                    file, line = p.file, p.line
                    break
        if file is None:
            file = self.captured.source or None
        return {
            "file": file, "line": line,
            "end_line": (frame.end_line or frame.line) if frame else line,
            "column": frame.column if frame else None,
            "end_column": frame.end_column if frame else None,
            "cell": self.flat.top_name, "stack": anchor.stack, "placements": placements,
        }


def placement_chain(flat: FlatLayout, instance: int) -> list[tuple[int, int]]:
    """(instance, parent cell) pairs from the top cell down to ``instance``."""
    chain = []
    inst = flat.instances
    while instance >= 0 and inst.parent[instance] >= 0:
        chain.append((instance, int(inst.cell[inst.parent[instance]])))
        instance = int(inst.parent[instance])
    return chain[::-1]
