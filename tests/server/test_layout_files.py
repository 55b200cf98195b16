"""GDSII and OASIS files read into a CapturedLayout in a sandboxed child, through the collection code of scripts."""

from pathlib import Path

import gdstk
import numpy as np
import pytest

from latchwatch.server.runs.pipeline import is_checkable
from latchwatch.server.sandbox.runner import read_layout_file


def read_layout(path):
    """The captured layout of a file read in a sandboxed child, as every check reads one."""
    outcome = read_layout_file(path, "oas" if str(path).endswith(".oas") else "gds")
    assert outcome.failure is None, outcome.failure
    return outcome.layout


def _library():
    lib = gdstk.Library(unit=1e-6, precision=1e-9)
    unit = lib.new_cell("UNIT")
    unit.add(gdstk.rectangle((0, 0), (1.5, 2.25), layer=2, datatype=0))
    unit.add(gdstk.Polygon([(0, 0), (3, 0), (1.5, 4)], layer=5, datatype=1))
    unit.add(gdstk.Label("VDD", (0.5, 1.0), layer=7, texttype=5))
    top = lib.new_cell("TOP")
    top.add(gdstk.Reference(unit, (10, 0), rotation=np.pi / 2, magnification=2, x_reflection=True))
    top.add(gdstk.Reference(unit, (0, 20), columns=3, rows=2, spacing=(5, 6)))
    top.add(gdstk.FlexPath([(0, -5), (20, -5)], 1.0, layer=9).to_polygons()[0])
    return lib


def _check(layout):
    names = [c.name for c in layout.cells]
    assert sorted(names) == ["TOP", "UNIT"]
    unit = layout.cells[layout.cell_index("UNIT")]
    top = layout.cells[layout.cell_index("TOP")]
    assert unit.poly_layer.tolist() == [2, 5] and unit.poly_datatype.tolist() == [0, 1]
    rect = unit.points[unit.poly_offsets[0]:unit.poly_offsets[1]]
    assert sorted(map(tuple, rect)) == [(0, 0), (0, 2.25), (1.5, 0), (1.5, 2.25)]
    assert unit.label_text == ["VDD"] and unit.label_layer.tolist() == [7] and unit.label_texttype.tolist() == [5]
    np.testing.assert_allclose(unit.label_origin, [(0.5, 1.0)])
    assert top.ref_cell.tolist() == [layout.cell_index("UNIT")] * 2
    assert top.ref_rotation[0] == pytest.approx(np.pi / 2) and top.ref_magnification[0] == 2
    assert top.ref_x_reflection.tolist() == [True, False]
    assert top.ref_columns.tolist() == [1, 3] and top.ref_rows.tolist() == [1, 2]
    np.testing.assert_allclose(top.ref_v1[1], (5, 0))
    np.testing.assert_allclose(top.ref_v2[1], (0, 6))
    assert top.poly_layer.tolist() == [9]
    # Files carry no Python stacks.
    for cell in layout.cells:
        assert (cell.poly_stack == -1).all() and (cell.ref_stack == -1).all() and (cell.label_stack == -1).all()
    assert layout.stacks == [] and layout.frames == []
    assert layout.top_cells() == [layout.cell_index("TOP")]
    assert layout.unit == pytest.approx(1e-6)


def test_gds_written_with_gdstk_reads_back(tmp_path):
    path = tmp_path / "chip.gds"
    _library().write_gds(str(path))
    layout = read_layout(path)
    assert layout.source == str(path)
    _check(layout)


def test_oasis_written_with_gdstk_reads_back(tmp_path):
    path = tmp_path / "chip.oas"
    _library().write_oas(str(path))
    _check(read_layout(path))


def test_polygon_repetitions_stored_in_the_file_arrive_expanded(tmp_path):
    lib = gdstk.Library()
    cell = lib.new_cell("ROW")
    rect = gdstk.rectangle((0, 0), (1, 1), layer=1)
    rect.repetition = gdstk.Repetition(4, 1, spacing=(3, 0))
    cell.add(rect)
    path = tmp_path / "row.oas"
    lib.write_oas(str(path))
    assert gdstk.read_oas(str(path)).cells[0].polygons[0].repetition.size == 4  # kept folded in the file
    captured = read_layout(path).cells[0]
    assert captured.polygon_count == 4
    starts = sorted(captured.points[captured.poly_offsets[k]:captured.poly_offsets[k + 1], 0].min() for k in range(4))
    assert starts == [0, 3, 6, 9]


def test_missing_file_is_a_failed_read_naming_it(tmp_path):
    outcome = read_layout_file(tmp_path / "absent.gds", "gds")
    assert outcome.failure is not None and "absent.gds" in outcome.failure.message
    assert is_checkable(Path("a/B.GDS")) and is_checkable(Path("x.oas")) and not is_checkable(Path("x.txt"))


def test_garbage_file_is_a_failed_read_naming_it(tmp_path):
    path = tmp_path / "broken.gds"
    path.write_bytes(b"this is not a GDSII stream at all" * 10)
    outcome = read_layout_file(path, "gds")
    assert outcome.failure is not None and "broken.gds" in outcome.failure.message


def test_a_klayout_context_info_cell_is_never_a_top(tmp_path):
    """KLayout-based writers add ``$$$CONTEXT_INFO$$$``, referencing every cell at the origin
    (seen in GDS files written by gdsfactory 9): the real top stays the top, and the
    metadata cell is not checked."""
    lib = _library()
    context = lib.new_cell("$$$CONTEXT_INFO$$$")
    for cell in list(lib.cells):
        if cell is not context:
            context.add(gdstk.Reference(cell))
    path = tmp_path / "klayout_like.gds"
    lib.write_gds(str(path))
    layout = read_layout(path)
    assert [layout.cells[i].name for i in layout.top_cells()] == ["TOP"]
