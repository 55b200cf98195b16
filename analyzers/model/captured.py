"""What a script run (or a GDSII/OASIS file) hands to the checker.

The layout is kept hierarchical and array-shaped: one ``CapturedCell`` per cell with
numpy arrays of its polygons, labels and references, and a table of interned stacks.
The child process builds it from gdstk objects (server/child/job.py), the wire format
ships it, and analyzers/layout/flatten.py expands it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from latchwatch.analyzers.model.findings import Frame

# Cells that carry a layout tool's metadata, not geometry (KLayout's context information).
METADATA_CELLS = frozenset({"$$$CONTEXT_INFO$$$"})
# How a script names a cell as its layout, strongest first (analyzers/layout/tops.py).
NAMING_KINDS = ("returned", "written", "shown", "assigned")


def _i32(n=0):
    return np.zeros(n, dtype=np.int32)


@dataclass
class CapturedCell:
    """One cell as captured: polygons, labels and references as numpy arrays, each with its stack id."""
    name: str
    # Polygons: vertices of polygon k are points[offsets[k]:offsets[k + 1]].
    poly_layer: np.ndarray = field(default_factory=_i32)
    poly_datatype: np.ndarray = field(default_factory=_i32)
    poly_offsets: np.ndarray = field(default_factory=lambda: np.zeros(1, dtype=np.int64))
    points: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    poly_stack: np.ndarray = field(default_factory=_i32)
    # Labels.
    label_text: list[str] = field(default_factory=list)
    label_layer: np.ndarray = field(default_factory=_i32)
    label_texttype: np.ndarray = field(default_factory=_i32)
    label_origin: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    label_stack: np.ndarray = field(default_factory=_i32)
    # References. ref_cell indexes CapturedLayout.cells. A reference stands for
    # columns x rows copies at origin + i*v1 + j*v2, or, when it has explicit offsets,
    # for one copy at origin + each of explicit[explicit_offsets[r]:explicit_offsets[r+1]].
    ref_cell: np.ndarray = field(default_factory=_i32)
    ref_origin: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    ref_rotation: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ref_magnification: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ref_x_reflection: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    ref_columns: np.ndarray = field(default_factory=_i32)
    ref_rows: np.ndarray = field(default_factory=_i32)
    ref_v1: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    ref_v2: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    ref_explicit_offsets: np.ndarray = field(default_factory=lambda: np.zeros(1, dtype=np.int64))
    ref_explicit: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    ref_stack: np.ndarray = field(default_factory=_i32)

    @property
    def polygon_count(self) -> int:
        return len(self.poly_layer)

    @property
    def reference_count(self) -> int:
        return len(self.ref_cell)


@dataclass(frozen=True)
class NamedCell:
    """A cell the script itself named as its layout: returned by the called function, written to a
    file, shown, or bound to a module-level name."""
    cell: int  # index into CapturedLayout.cells
    how: str  # one of NAMING_KINDS
    detail: str = ""  # the function, the file name (no folder) or the variable
    stack: int = -1  # the stack of the call or line that named it, -1 when unknown

    def __post_init__(self):
        if self.how not in NAMING_KINDS:
            raise ValueError(f"NamedCell.how must be one of {', '.join(NAMING_KINDS)}, got {self.how!r}")


@dataclass
class CapturedLayout:
    """Cells plus the interned provenance of every object in them."""

    cells: list[CapturedCell]
    # frames[i] is one frame; stacks[s] lists frame indices, innermost first.
    frames: list[Frame] = field(default_factory=list)
    stacks: list[tuple[int, ...]] = field(default_factory=list)
    source: str = ""
    unit: float = 1e-6  # metres per user unit
    precision: float = 1e-9  # metres: the database grid coordinates are snapped to after transforms
    named: list[NamedCell] = field(default_factory=list)  # in the order the script named them
    imports: tuple[str, ...] = ()  # the layout libraries the script imported (child/naming.py LAYOUT_LIBRARIES)

    def stack_frames(self, stack_id: int) -> tuple[Frame, ...]:
        if stack_id < 0 or stack_id >= len(self.stacks):
            return ()
        return tuple(self.frames[i] for i in self.stacks[stack_id])

    def cell_index(self, name: str) -> int | None:
        for i, cell in enumerate(self.cells):
            if cell.name == name:
                return i
        return None

    def top_cells(self) -> list[int]:
        """Cells no other layout cell references, in capture order; metadata cells are never tops.

        KLayout-based writers add a metadata cell that references every cell at the
        origin: its references make nothing a non-top, and it is not checked itself."""
        referenced = np.zeros(len(self.cells), dtype=bool)
        metadata = np.array([cell.name in METADATA_CELLS for cell in self.cells], dtype=bool)
        for cell, is_metadata in zip(self.cells, metadata, strict=True):
            if not is_metadata:
                referenced[cell.ref_cell] = True
        return [int(i) for i in np.flatnonzero(~referenced & ~metadata)]

    @property
    def shape_count(self) -> int:
        return sum(c.polygon_count for c in self.cells)
