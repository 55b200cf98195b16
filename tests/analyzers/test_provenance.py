"""Anchors: the innermost user frame whose line is layer-specific (docs/provenance.md)."""

from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.layout.provenance import Provenance, is_user_file
from latchwatch.analyzers.model.findings import Frame

from builders import ACTIVE, NWELL, PPLUS, CellBuilder, layout

F = "/proj/cell.py"
frames = [
    Frame(F, 3, "box"),        # 0: the helper's body: draws every layer
    Frame(F, 10, "inverter"),  # 1: box(cell, ACTIVE, ...)
    Frame(F, 11, "inverter"),  # 2: box(cell, PPLUS, ...)
    Frame(F, 12, "inverter"),  # 3: box(cell, NWELL, ...)
    Frame(F, 20, "<module>"),  # 4: inverter(cell) call site
    Frame("/usr/lib/python3/site-packages/gdstk_helpers.py", 5, "lib"),  # 5: not user code
]
stacks = [(0, 1, 4), (0, 2, 4), (0, 3, 4), (5, 0, 1, 4)]


def _prov():
    c = CellBuilder("TOP").rect(ACTIVE, 0, 0, 1, 1, stack=0).rect(PPLUS, 0, 0, 1, 1, stack=1)
    c.rect(NWELL, 0, 0, 1, 1, stack=2).rect(ACTIVE, 2, 0, 3, 1, stack=3)
    return Provenance(flatten(layout(c, frames=frames, stacks=stacks), 0), "/proj")


def test_generic_helper_line_is_skipped_for_its_caller():
    p = _prov()
    a = p.anchor(0)
    assert a.frame.line == 10
    assert [f.line for f in a.stack] == [10, 20]  # the anchor, then its call sites


def test_library_frames_are_not_user_frames():
    a = _prov().anchor(3)
    assert a.frame.line == 10
    assert not is_user_file("/usr/lib/python3/site-packages/x.py", None)
    assert is_user_file("/proj/a/b.py", "/proj") and not is_user_file("/other/b.py", "/proj")


def test_placements_name_instances_with_row_and_column():
    pframes = [Frame(F, 40, "<module>")]
    unit = CellBuilder("UNIT").rect(ACTIVE, 0, 0, 1, 1)
    top = CellBuilder("ROW").ref(0, columns=4, rows=2, v1=(5, 0), v2=(0, 5), stack=0)
    flat = flatten(layout(unit, top, frames=pframes, stacks=[(0,)]), 1)
    p = Provenance(flat, "/proj")
    last = len(flat.polygons) - 1
    (placement,) = p.placements(int(flat.instance[last]))
    assert (placement.line, placement.cell, placement.instance) == (40, "ROW", "UNIT[3,1]")
    loc = p.locate_shape(last)
    # A shape without user frames is published on the placement that brought it in.
    assert loc["line"] == 40 and loc["cell"] == "ROW"
