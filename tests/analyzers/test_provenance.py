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
    loc = p.locate_shape(last)
    (placement,) = loc["placements"]
    assert (placement.line, placement.cell, placement.instance) == (40, "ROW", "UNIT[3,1]")
    # A shape without user frames is published on the placement that brought it in.
    assert loc["line"] == 40 and loc["cell"] == "ROW"


def _factory_pair(draw_line_layers):
    """A cell drawn once by a factory call on line 6 and brought in again by line 7.

    Cells: 0 the drawn cell, 1 and 2 the factory's wrappers made on lines 6 and 7 (each
    places cell 0), 3 the top placing both. ``draw_line_layers`` are the layers line 6 drew.
    """
    library = Frame("/usr/lib/python3/site-packages/pdk/cells.py", 30, "transistor")
    pframes = [library, Frame(F, 6, "<module>"), Frame(F, 7, "<module>")]
    drawn = CellBuilder("RECTANGLE")
    for k, layer in enumerate(draw_line_layers):
        drawn.rect(layer, 0, 3 * k, 1, 3 * k + 1, stack=0)
    first = CellBuilder("FET_RINGED").ref(0, stack=1)
    second = CellBuilder("FET_BARE").ref(0, stack=2)
    top = CellBuilder("PAIR").ref(1).ref(2, origin=(60, 0))
    flat = flatten(layout(drawn, first, second, top, frames=pframes, stacks=[(0, 1), (0, 1), (0, 2)]), 3)
    return flat, Provenance(flat, "/proj")


def test_a_cached_cell_is_published_on_the_call_that_brought_it_in():
    # Line 6 called a factory that drew two layers: not the line of one shape. The
    # occurrence placed by line 7 (the cached cell handed out again) is published there.
    flat, p = _factory_pair([ACTIVE, PPLUS])
    by_x = {round(float(flat.polygons[i].bounds[0])): i for i in range(len(flat.polygons)) if flat.layer[i] == ACTIVE[0]}
    first, second = p.locate_shape(by_x[0]), p.locate_shape(by_x[60])
    assert (first["line"], [f.line for f in first["stack"]]) == (6, [6])
    assert (second["line"], [f.line for f in second["stack"]]) == (7, [7])
    assert [pl.cell for pl in second["placements"]] == ["PAIR", "FET_BARE"]


def test_a_line_that_draws_one_layer_keeps_its_shapes_wherever_they_are_placed():
    flat, p = _factory_pair([ACTIVE])
    lines = {p.locate_shape(i)["line"] for i in range(len(flat.polygons))}
    assert lines == {6}
