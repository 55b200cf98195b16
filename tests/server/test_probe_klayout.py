"""The KLayout capture backend: what it collects from klayout.db cells and the stacks it records, in a real child."""

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from latchwatch.server.sandbox.runner import read_layout_file, run_script

kdb = pytest.importorskip("klayout.db")


def _run(tmp_path, body, name="gen.py", **kwargs):
    script = tmp_path / name
    script.write_text(textwrap.dedent(body), encoding="utf-8")
    outcome = run_script(script, timeout=30, **kwargs)
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    return script, outcome.layout


def _lines(layout, stack_id):
    return [(f.function, f.line) for f in layout.stack_frames(int(stack_id))]


def _polygon(cell, k):
    return cell.points[cell.poly_offsets[k]:cell.poly_offsets[k + 1]]


def _cell(layout, name):
    return layout.cells[layout.cell_index(name)]


def test_every_shape_kind_in_both_units_carries_its_line(tmp_path):
    _script, layout = _run(tmp_path, """\
        import klayout.db as kdb
        ly = kdb.Layout()
        ly.dbu = 0.005
        top = ly.create_cell("TOP")
        def on(n): return top.shapes(ly.layer(n, 0))
        on(1).insert(kdb.Box(0, 0, 200, 400))
        on(2).insert(kdb.DBox(0, 0, 1, 2))
        on(3).insert(kdb.Polygon([kdb.Point(0, 0), kdb.Point(200, 0), kdb.Point(0, 200)]))
        on(4).insert(kdb.DPolygon([kdb.DPoint(0, 0), kdb.DPoint(1, 0), kdb.DPoint(0, 1)]))
        on(5).insert(kdb.SimplePolygon(kdb.Box(0, 0, 20, 20)))
        on(6).insert(kdb.DSimplePolygon(kdb.DBox(0, 0, 0.1, 0.1)))
        on(7).insert(kdb.Path([kdb.Point(0, 0), kdb.Point(400, 0)], 200))
        on(8).insert(kdb.DPath([kdb.DPoint(0, 0), kdb.DPoint(2, 0)], 1.0))
        top.shapes(ly.layer(9, 5)).insert(kdb.Text("VDD", 200, 400))
        top.shapes(ly.layer(9, 5)).insert(kdb.DText("VSS", 3.0, 4.0))
        on(10).insert_box(kdb.Box(0, 0, 20, 20))
        on(11).insert(kdb.Edge(0, 0, 100, 100))
        """)
    (cell,) = layout.cells
    assert cell.poly_layer.tolist() == list(range(1, 9)) + [10]  # the edge has no area
    assert [_lines(layout, s) for s in cell.poly_stack] == [[("<module>", n)] for n in (*range(6, 14), 16)]
    # Coordinates in micrometres, from a 5 nm database unit.
    np.testing.assert_allclose(_polygon(cell, 0), [(0, 0), (1, 0), (1, 2), (0, 2)])
    np.testing.assert_allclose(_polygon(cell, 1), [(0, 0), (1, 0), (1, 2), (0, 2)])
    assert {tuple(p) for p in _polygon(cell, 2)} == {(0, 0), (1, 0), (0, 1)}
    assert {tuple(p) for p in _polygon(cell, 3)} == {(0, 0), (1, 0), (0, 1)}
    # A path of width 1 um from (0, 0) to (2, 0): its outline, flush ends.
    assert {tuple(p) for p in _polygon(cell, 6)} == {(0, -0.5), (0, 0.5), (2, 0.5), (2, -0.5)}
    assert {tuple(p) for p in _polygon(cell, 7)} == {(0, -0.5), (0, 0.5), (2, 0.5), (2, -0.5)}
    assert sorted(cell.label_text) == ["VDD", "VSS"]
    assert cell.label_layer.tolist() == [9, 9] and cell.label_texttype.tolist() == [5, 5]
    origins = dict(zip(cell.label_text, map(tuple, cell.label_origin), strict=True))
    assert origins == {"VDD": (1.0, 2.0), "VSS": (3.0, 4.0)}
    lines = dict(zip(cell.label_text, (_lines(layout, s)[0][1] for s in cell.label_stack), strict=True))
    assert lines == {"VDD": 14, "VSS": 15}
    assert layout.precision == pytest.approx(5e-9) and layout.unit == 1e-6


def test_helper_stacks_survive_the_layouts_reordering(tmp_path):
    # KLayout sorts a cell's shapes spatially: the stacks must follow the shapes, not the order.
    _script, layout = _run(tmp_path, """\
        import klayout.db as kdb

        def box(cell, layer, x0, y0, x1, y1):
            cell.shapes(layer).insert(kdb.DBox(x0, y0, x1, y1))

        def left(cell, layer, i):
            box(cell, layer, -i - 1, 0, -i, 1)

        def right(cell, layer, i):
            box(cell, layer, i, 0, i + 1, 1)

        ly = kdb.Layout()
        top = ly.create_cell("TOP")
        l1 = ly.layer(1, 0)
        for i in range(3000):
            (left if i % 3 else right)(top, l1, i)
        """)
    (cell,) = layout.cells
    assert cell.polygon_count == 3000
    xs = cell.points[cell.poly_offsets[:-1]][:, 0]
    stacks = [_lines(layout, s) for s in cell.poly_stack]
    expected = {True: [("box", 4), ("right", 10), ("<module>", 16)],
                False: [("box", 4), ("left", 7), ("<module>", 16)]}
    assert all(stack == expected[bool(x >= 0)] for x, stack in zip(xs, stacks, strict=True))


def test_instances_and_arrays_keep_placement_and_line(tmp_path):
    _script, layout = _run(tmp_path, """\
        import klayout.db as kdb
        ly = kdb.Layout()
        unit = ly.create_cell("UNIT")
        unit.shapes(ly.layer(4, 0)).insert(kdb.DBox(0, 0, 1, 2))
        top = ly.create_cell("TOP")
        top.insert(kdb.CellInstArray(unit.cell_index(), kdb.Trans(kdb.Trans.M90, kdb.Vector(10000, 0))))
        top.insert(kdb.DCellInstArray(unit.cell_index(), kdb.DTrans(), kdb.DVector(2.5, 0), kdb.DVector(0, 4), 4, 3))
        top.insert(kdb.DCellInstArray(unit.cell_index(), kdb.DCplxTrans(3, 45, True, kdb.DVector(1, 2))))
        """)
    assert [c.name for c in layout.cells] == ["UNIT", "TOP"]
    top = _cell(layout, "TOP")
    order = np.argsort(top.ref_columns)  # KLayout keeps its own order of instances
    assert top.ref_cell.tolist() == [0, 0, 0]
    assert top.ref_columns[order].tolist()[-1] == 4 and top.ref_rows.max() == 3
    array = int(np.flatnonzero(top.ref_columns == 4)[0])
    np.testing.assert_allclose(top.ref_v1[array], (2.5, 0))
    np.testing.assert_allclose(top.ref_v2[array], (0, 4))
    mirrored = [k for k in range(3) if top.ref_x_reflection[k]]
    assert len(mirrored) == 2
    by_line = {_lines(layout, s)[0][1]: k for k, s in enumerate(top.ref_stack)}
    assert sorted(by_line) == [6, 7, 8]
    # M90 mirrors at the y axis: a mirror at the x axis, then a half turn (KLayout's Trans docs).
    k = by_line[6]
    assert top.ref_x_reflection[k] and top.ref_rotation[k] == pytest.approx(np.pi)
    np.testing.assert_allclose(top.ref_origin[k], (10, 0))
    k = by_line[8]
    assert top.ref_magnification[k] == 3 and top.ref_rotation[k] == pytest.approx(np.pi / 4)
    np.testing.assert_allclose(top.ref_origin[k], (1, 2))
    assert layout.top_cells() == [1]


def test_a_region_inserted_whole_gives_each_polygon_the_line(tmp_path):
    _script, layout = _run(tmp_path, """\
        import klayout.db as kdb
        ly = kdb.Layout()
        top = ly.create_cell("TOP")
        region = kdb.Region([kdb.Box(0, 0, 1000, 1000), kdb.Box(5000, 0, 6000, 1000)])
        holed = kdb.Polygon(kdb.Box(0, 0, 10000, 10000))
        holed.insert_hole(kdb.Box(4000, 4000, 6000, 6000))
        assert top.shapes(ly.layer(2, 0)).insert(region) is not None
        top.shapes(ly.layer(3, 0)).insert(holed)
        top.shapes(ly.layer(5, 0)).insert(kdb.Edges([kdb.Edge(0, 0, 1, 1)]))
        """)
    (cell,) = layout.cells
    assert cell.poly_layer.tolist() == [2, 2, 3]
    assert [_lines(layout, s)[0][1] for s in cell.poly_stack] == [7, 7, 8]
    # The hole is joined to the hull: the outline covers 100 - 4 um2.
    ring = _polygon(cell, 2)
    x, y = ring[:, 0], ring[:, 1]
    assert abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))) / 2 == pytest.approx(96)


def test_flatten_gives_the_moved_shapes_the_flatten_line(tmp_path):
    _script, layout = _run(tmp_path, """\
        import klayout.db as kdb
        ly = kdb.Layout()
        unit = ly.create_cell("UNIT")
        unit.shapes(ly.layer(4, 0)).insert(kdb.DBox(0, 0, 1, 2))
        top = ly.create_cell("TOP")
        top.insert(kdb.DCellInstArray(unit.cell_index(), kdb.DTrans(5, 0)))
        top.flatten(False)
        """)
    top = _cell(layout, "TOP")
    assert top.reference_count == 0 and top.poly_layer.tolist() == [4]
    assert _lines(layout, top.poly_stack[0]) == [("<module>", 7)]


def test_gdstk_and_klayout_cells_go_into_one_layout(tmp_path):
    pytest.importorskip("gdstk")
    _script, layout = _run(tmp_path, """\
        import gdstk
        import klayout.db as kdb
        lib = gdstk.Library()
        g = lib.new_cell("FROM_GDSTK")
        g.add(gdstk.rectangle((0, 0), (1, 1), layer=1))
        ly = kdb.Layout()
        k = ly.create_cell("FROM_KLAYOUT")
        k.shapes(ly.layer(2, 0)).insert(kdb.DBox(0, 0, 3, 3))
        """)
    assert [c.name for c in layout.cells] == ["FROM_GDSTK", "FROM_KLAYOUT"]
    assert [_lines(layout, c.poly_stack[0])[0][1] for c in layout.cells] == [5, 8]
    np.testing.assert_allclose(layout.cells[1].points.max(axis=0), (3, 3))


def test_a_call_returning_a_klayout_cell_collects_that_cell_and_what_it_places(tmp_path):
    script = tmp_path / "gen.py"
    script.write_text(textwrap.dedent("""\
        import klayout.db as kdb

        def block(width=1.0):
            ly = kdb.Layout()
            leaf = ly.create_cell("LEAF")
            leaf.shapes(ly.layer(1, 0)).insert(kdb.DBox(0, 0, width, 1))
            top = ly.create_cell("BLOCK")
            top.insert(kdb.DCellInstArray(leaf.cell_index(), kdb.DTrans()))
            ly.create_cell("UNUSED")
            return top
        """))
    outcome = run_script(script, call=("block", {"width": 2.5}))
    assert outcome.status == "ok", outcome.failure
    assert [c.name for c in outcome.layout.cells] == ["BLOCK", "LEAF"]
    np.testing.assert_allclose(outcome.layout.cells[1].points.max(axis=0), (2.5, 1))


def _python_with_klayout_only(tmp_path):
    """A virtual environment that sees numpy and klayout from this one, but not gdstk."""
    here = Path(np.__file__).resolve().parents[1]
    venv = tmp_path / "klayout-only"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    python = venv / "bin" / "python"
    site = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          capture_output=True, text=True, check=True).stdout.strip()
    for name in os.listdir(here):
        if name.split("-")[0].split(".")[0] in ("numpy", "klayout", "pya"):
            os.symlink(here / name, Path(site) / name)
    probe = subprocess.run([str(python), "-I", "-c", "import gdstk"], capture_output=True)
    assert probe.returncode != 0, "gdstk is still importable"
    return str(python)


def test_an_interpreter_without_gdstk_captures_klayout_and_reads_layout_files(tmp_path):
    python = _python_with_klayout_only(tmp_path)
    _script, layout = _run(tmp_path, """\
        import pya
        ly = pya.Layout()
        top = ly.create_cell("TOP")
        top.shapes(ly.layer(1, 0)).insert(pya.DBox(0, 0, 4, 4))
        ly.write("out.gds")
        """, python=python)
    assert _lines(layout, layout.cells[0].poly_stack[0]) == [("<module>", 4)]
    written = tmp_path / "written.gds"
    ly = kdb.Layout()
    ly.create_cell("FILE_TOP").shapes(ly.layer(7, 0)).insert(kdb.DBox(0, 0, 2, 1))
    ly.write(str(written))
    outcome = read_layout_file(written, "gds", python=python)
    assert outcome.status == "ok", outcome.failure
    (cell,) = outcome.layout.cells
    assert cell.name == "FILE_TOP" and cell.poly_layer.tolist() == [7] and cell.poly_stack.tolist() == [-1]
    np.testing.assert_allclose(cell.points.max(axis=0), (2, 1))
