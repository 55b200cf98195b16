"""The probe: what it collects from gdstk cells, and the stacks it records in a real child."""

import textwrap

import gdstk
import numpy as np
import pytest

from latchwatch.server.child import collect_gdstk, stacks
from latchwatch.server.sandbox import wire
from latchwatch.server.sandbox.runner import run_script


def _collect(cells):
    header, arrays = collect_gdstk.collect(cells)
    return wire.layout_from_parts(header, arrays)


def _polygon(cell, k):
    return cell.points[cell.poly_offsets[k]:cell.poly_offsets[k + 1]]


# -- collection, in this process -------------------------------------------------------


def test_polygon_repetition_is_expanded_in_place():
    cell = gdstk.Cell("REP")
    cell.add(gdstk.rectangle((0, 0), (1, 1), layer=1))
    repeated = gdstk.rectangle((0, 0), (2, 1), layer=2, datatype=7)
    repeated.repetition = gdstk.Repetition(3, 2, spacing=(10, 20))
    cell.add(repeated)
    cell.add(gdstk.rectangle((5, 5), (6, 6), layer=3))
    captured = _collect([cell]).cells[0]
    assert captured.polygon_count == 1 + 6 + 1
    np.testing.assert_array_equal(captured.poly_layer, [1, 2, 2, 2, 2, 2, 2, 3])
    np.testing.assert_array_equal(captured.poly_datatype, [0, 7, 7, 7, 7, 7, 7, 0])
    base = repeated.points
    shifts = sorted(tuple(_polygon(captured, k)[0] - base[0]) for k in range(1, 7))
    assert shifts == [(dx, dy) for dx in (0, 10, 20) for dy in (0, 20)]
    for k in range(1, 7):  # every copy is the same shape, moved
        np.testing.assert_array_equal(_polygon(captured, k) - _polygon(captured, k)[0], base - base[0])
    np.testing.assert_array_equal(_polygon(captured, 7), gdstk.rectangle((5, 5), (6, 6)).points)
    assert captured.poly_stack.tolist() == [-1] * 8


def test_references_keep_transform_and_every_repetition_kind():
    unit = gdstk.Cell("UNIT")
    unit.add(gdstk.rectangle((0, 0), (1, 1)))
    top = gdstk.Cell("TOP")
    top.add(gdstk.Reference(unit, (1, 2), rotation=0.5, magnification=2.5, x_reflection=True))
    top.add(gdstk.Reference(unit, (0, 0), columns=3, rows=2, spacing=(4, 5)))
    regular = gdstk.Reference(unit, (7, 8))
    regular.repetition = gdstk.Repetition(2, 4, v1=(3, 1), v2=(-1, 6))
    top.add(regular)
    explicit = gdstk.Reference(unit, (0, 0))
    explicit.repetition = gdstk.Repetition(offsets=[(1, 2), (3, 4)])
    top.add(explicit)
    along_x = gdstk.Reference(unit, (0, 0))
    along_x.repetition = gdstk.Repetition(x_offsets=[5, 9])
    top.add(along_x)
    layout = _collect([top])
    assert [c.name for c in layout.cells] == ["TOP", "UNIT"]  # the referenced cell is pulled in
    refs = layout.cells[0]
    np.testing.assert_array_equal(refs.ref_cell, [1, 1, 1, 1, 1])
    np.testing.assert_array_equal(refs.ref_origin[0], (1, 2))
    assert refs.ref_rotation[0] == 0.5 and refs.ref_magnification[0] == 2.5
    assert refs.ref_x_reflection.tolist() == [True, False, False, False, False]
    assert refs.ref_columns.tolist() == [1, 3, 2, 1, 1] and refs.ref_rows.tolist() == [1, 2, 4, 1, 1]
    np.testing.assert_array_equal(refs.ref_v1[1:3], [(4, 0), (3, 1)])
    np.testing.assert_array_equal(refs.ref_v2[1:3], [(0, 5), (-1, 6)])
    # Explicit repetitions list every copy's offset; gdstk counts the original as (0, 0).
    assert refs.ref_explicit_offsets.tolist() == [0, 0, 0, 0, 3, 6]
    np.testing.assert_array_equal(refs.ref_explicit, [(0, 0), (1, 2), (3, 4), (0, 0), (5, 0), (9, 0)])


def test_paths_become_polygons_on_their_own_layers():
    cell = gdstk.Cell("PATHS")
    flex = gdstk.FlexPath([(0, 0), (10, 0)], [1.0, 0.5], 2.0, layer=[3, 4], datatype=[0, 1])
    robust = gdstk.RobustPath((0, 0), 1.0, layer=5, datatype=2)
    robust.segment((5, 5))
    cell.add(flex, robust)
    captured = _collect([cell]).cells[0]
    expected = flex.to_polygons() + robust.to_polygons()
    assert captured.poly_layer.tolist() == [3, 4, 5]
    assert captured.poly_datatype.tolist() == [0, 1, 2]
    for k, polygon in enumerate(expected):
        np.testing.assert_array_equal(_polygon(captured, k), polygon.points)


def test_labels_with_repetition():
    cell = gdstk.Cell("LABELS")
    cell.add(gdstk.Label("VDD", (1, 2), layer=7, texttype=5))
    repeated = gdstk.Label("PAD1", (0, 0), layer=8)
    repeated.repetition = gdstk.Repetition(2, 1, spacing=(3, 0))
    cell.add(repeated)
    captured = _collect([cell]).cells[0]
    assert captured.label_text == ["VDD", "PAD1", "PAD1"]
    assert captured.label_layer.tolist() == [7, 8, 8] and captured.label_texttype.tolist() == [5, 0, 0]
    np.testing.assert_array_equal(captured.label_origin, [(1, 2), (0, 0), (3, 0)])


def test_reference_by_name_links_a_known_cell_or_gets_a_placeholder():
    known = gdstk.Cell("KNOWN")
    top = gdstk.Cell("TOP")
    top.add(gdstk.Reference("KNOWN"), gdstk.Reference("ELSEWHERE"), gdstk.Reference("ELSEWHERE", (1, 1)))
    layout = _collect([top, known])
    assert [c.name for c in layout.cells] == ["TOP", "KNOWN", "ELSEWHERE"]
    assert layout.cells[0].ref_cell.tolist() == [1, 2, 2]
    assert layout.cells[2].polygon_count == 0


# -- capture in a real child ---------------------------------------------------------------


def _run(tmp_path, body, name="gen.py", **kwargs):
    script = tmp_path / name
    script.write_text(textwrap.dedent(body), encoding="utf-8")
    outcome = run_script(script, timeout=20, **kwargs)
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    return script, outcome.layout


def _lines(layout, stack_id):
    return [(f.function, f.line) for f in layout.stack_frames(stack_id)]


def test_helper_stack_points_at_the_callers_line(tmp_path):
    script, layout = _run(tmp_path, """\
        import gdstk

        def box(cell, layer, x0, y0, x1, y1):
            cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer))

        def inverter(cell, x):
            box(cell, 2, x, 0, x + 1, 1)
            box(cell, 5, x, 2, x + 1, 3)

        lib = gdstk.Library()
        top = lib.new_cell("TOP")
        inverter(top, 0)
        inverter(top, 5)
        box(top, 1, 0, 0, 20, 10)
        """)
    cell = layout.cells[0]
    stacks = [_lines(layout, s) for s in cell.poly_stack]
    assert stacks == [
        [("box", 4), ("inverter", 7), ("<module>", 12)],
        [("box", 4), ("inverter", 8), ("<module>", 12)],
        [("box", 4), ("inverter", 7), ("<module>", 13)],
        [("box", 4), ("inverter", 8), ("<module>", 13)],
        [("box", 4), ("<module>", 14)],
    ]
    frame = layout.stack_frames(int(cell.poly_stack[4]))[1]
    assert frame.file == str(script)
    # Columns are 1-based and span the call expression "box(top, 1, 0, 0, 20, 10)".
    assert (frame.column, frame.end_line, frame.end_column) == (1, 14, 26)


def test_hierarchy_and_arrays_are_captured_exactly(tmp_path):
    _script, layout = _run(tmp_path, """\
        import math
        import gdstk

        unit = gdstk.Cell("UNIT")
        unit.add(gdstk.rectangle((0, 0), (1, 2), layer=4))
        top = gdstk.Cell("TOP")
        top.add(gdstk.Reference(unit, (10, 0), rotation=math.pi / 2, magnification=3, x_reflection=True))
        top.add(gdstk.Reference(unit, (0, 0), columns=4, rows=3, spacing=(2.5, 4)))
        arr = gdstk.Reference(unit, (1, 1))
        arr.repetition = gdstk.Repetition(2, 2, v1=(3, 1), v2=(1, 3))
        top.add(arr)
        arr = gdstk.Reference(unit, (0, 0))
        arr.repetition = gdstk.Repetition(y_offsets=[2, 7])
        top.add(arr)
        """)
    names = [c.name for c in layout.cells]
    assert names == ["UNIT", "TOP"]
    top = layout.cells[1]
    assert top.ref_cell.tolist() == [0, 0, 0, 0]
    assert top.ref_rotation[0] == np.pi / 2 and top.ref_magnification[0] == 3 and top.ref_x_reflection[0]
    assert top.ref_columns.tolist() == [1, 4, 2, 1] and top.ref_rows.tolist() == [1, 3, 2, 1]
    np.testing.assert_array_equal(top.ref_v1[1:3], [(2.5, 0), (3, 1)])
    np.testing.assert_array_equal(top.ref_v2[1:3], [(0, 4), (1, 3)])
    np.testing.assert_array_equal(top.ref_explicit, [(0, 0), (0, 2), (0, 7)])
    assert [_lines(layout, s)[0][1] for s in top.ref_stack] == [7, 8, 11, 14]
    np.testing.assert_array_equal(layout.cells[0].points, gdstk.rectangle((0, 0), (1, 2)).points)
    assert layout.top_cells() == [1]


def test_every_created_cell_is_captured_even_outside_a_library(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk
        lib = gdstk.Library()
        kept = lib.new_cell("IN_LIBRARY")
        lone = gdstk.Cell("NEVER_ADDED")
        lone.add(gdstk.rectangle((0, 0), (1, 1), layer=9))
        copied = lone.copy("COPIED")
        other = gdstk.Library()
        """)
    names = [c.name for c in layout.cells]
    assert names == ["IN_LIBRARY", "NEVER_ADDED", "COPIED"]
    lone, copied = layout.cells[1], layout.cells[2]
    assert lone.poly_layer.tolist() == [9]
    assert _lines(layout, lone.poly_stack[0]) == [("<module>", 5)]
    # A shallow copy shares the polygon, and with it the line that added it.
    assert _lines(layout, copied.poly_stack[0]) == [("<module>", 5)]


def test_cells_read_from_a_file_still_pass_isinstance(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk
        lib = gdstk.Library()
        cell = lib.new_cell("A")
        cell.add(gdstk.rectangle((0, 0), (1, 1)))
        lib.write_gds("a.gds")
        again = gdstk.read_gds("a.gds")
        assert isinstance(again.cells[0], gdstk.Cell), type(again.cells[0])
        assert isinstance(again, gdstk.Library)
        assert not isinstance(again.cells[0], type("Mine", (gdstk.Cell,), {}))
        top = gdstk.Cell("TOP")
        top.add(gdstk.Reference(again.cells[0]))
        """)
    assert [c.name for c in layout.cells] == ["A", "TOP", "A"]
    assert layout.cells[1].ref_cell.tolist() == [2]  # the cell read back, not the one written
    assert layout.cells[2].poly_stack.tolist() == [-1]  # read from a file: no stack


def test_paths_and_labels_carry_the_stack_of_their_add(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk
        cell = gdstk.Cell("P")
        path = gdstk.FlexPath([(0, 0), (10, 0)], [1, 1], 3, layer=[1, 2])
        robust = gdstk.RobustPath((0, 0), 1, layer=3)
        robust.segment((4, 4))
        cell.add(path)
        cell.add(robust, gdstk.Label("VSS", (1, 1), layer=7))
        """)
    cell = layout.cells[0]
    assert cell.poly_layer.tolist() == [1, 2, 3]
    assert [_lines(layout, s)[0][1] for s in cell.poly_stack] == [6, 6, 7]
    assert cell.label_text == ["VSS"] and _lines(layout, cell.label_stack[0]) == [("<module>", 7)]


def test_generator_frames_are_not_cached_across_resumes(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk

        def box(cell, layer):
            cell.add(gdstk.rectangle((0, 0), (1, 1), layer=layer))

        def steps(cell):
            box(cell, 1)
            yield
            box(cell, 2)
            yield

        top = gdstk.Cell("TOP")
        walk = steps(top)
        next(walk)
        next(walk)
        """)
    stacks = [_lines(layout, s) for s in layout.cells[0].poly_stack]
    assert stacks == [[("box", 4), ("steps", 7), ("<module>", 14)],
                      [("box", 4), ("steps", 9), ("<module>", 15)]]


def test_stacks_are_depth_limited_and_many_frames_stay_correct(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk

        def box(cell, n):
            cell.add(gdstk.rectangle((0, 0), (1, 1), layer=n))

        def deep(cell, n):
            if n == 0:
                box(cell, 1)
            else:
                deep(cell, n - 1)

        def unit(cell, i):
            box(cell, 2)

        top = gdstk.Cell("TOP")
        deep(top, 30)
        for i in range(6000):
            unit(top, i)
        unit(top, -1)
        """)
    cell = layout.cells[0]
    assert len(layout.stack_frames(int(cell.poly_stack[0]))) == stacks.STACK_DEPTH
    assert _lines(layout, cell.poly_stack[0])[:3] == [("box", 4), ("deep", 8), ("deep", 10)]
    assert {tuple(_lines(layout, s)) for s in cell.poly_stack[1:-1]} == {(("box", 4), ("unit", 13), ("<module>", 18))}
    assert _lines(layout, cell.poly_stack[-1]) == [("box", 4), ("unit", 13), ("<module>", 19)]


def test_columns_count_characters_not_bytes(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk
        cell = gdstk.Cell("U")
        name = "µ-räil"; cell.add(gdstk.rectangle((0, 0), (1, 1)))
        """)
    frame = layout.stack_frames(int(layout.cells[0].poly_stack[0]))[0]
    assert frame.column == 18  # 'cell.add(' starts at character 18 (byte 21)


def test_removed_and_readded_elements_map_by_identity(tmp_path):
    _script, layout = _run(tmp_path, """\
        import gdstk
        cell = gdstk.Cell("X")
        a = gdstk.rectangle((0, 0), (1, 1), layer=1)
        b = gdstk.rectangle((0, 0), (1, 1), layer=2)
        cell.add(a)
        cell.add(b)
        cell.remove(a)
        cell.add(a)
        """)
    cell = layout.cells[0]
    assert cell.poly_layer.tolist() == [2, 1]
    assert [_lines(layout, s)[0][1] for s in cell.poly_stack] == [6, 8]


@pytest.mark.parametrize("count", [0, 3])
def test_multi_element_adds_spread_their_stack(tmp_path, count):
    _script, layout = _run(tmp_path, f"""\
        import gdstk
        cell = gdstk.Cell("M")
        cell.add()
        cell.add(*[gdstk.rectangle((i, 0), (i + 1, 1)) for i in range({count})])
        cell.add(gdstk.rectangle((0, 5), (1, 6), layer=4))
        """)
    cell = layout.cells[0]
    assert [_lines(layout, s)[0][1] for s in cell.poly_stack] == [4] * count + [5]
