"""Which cells a real run checks, and why (server/child/naming.py, analyzers/layout/tops.py), in a child.

The klayout.db and gdstk cases run everywhere (klayout is in the test extra); the
gdsfactory 9 cases need an interpreter with gdsfactory, LATCHWATCH_GF9_PYTHON or
/tmp/gf9venv/bin/python, and are skipped without one.
"""

import importlib.util
import os
import textwrap
from pathlib import Path

import pytest

from latchwatch.analyzers.check import CheckOptions, check_outcome, select_rules
from latchwatch.analyzers.model.findings import Severity
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.sandbox.runner import read_layout_file, run_script

kdb = pytest.importorskip("klayout.db")
DEMO = load_technology("demo")
GF9_PYTHON = os.environ.get("LATCHWATCH_GF9_PYTHON", "/tmp/gf9venv/bin/python")
needs_gdsfactory = pytest.mark.skipif(not Path(GF9_PYTHON).exists(),
                                      reason=f"no interpreter with gdsfactory 9 at {GF9_PYTHON} "
                                             "(set LATCHWATCH_GF9_PYTHON)")


def checked(tmp_path, body, python=None, rules=None):
    """(the run, [(top cell, reason, line)], findings) of a script run and checked with the demo technology."""
    script = tmp_path / "gen.py"
    script.write_text(textwrap.dedent(body), encoding="utf-8")
    outcome = run_script(script, timeout=60, python=python)
    result = check_outcome(outcome, DEMO, CheckOptions(project_root=str(tmp_path)),
                           rules=select_rules(rules) if rules else select_rules(["no-geometry"]))
    return outcome, [(t.name, t.reason, t.line) for t in result.tops], result.findings


def test_two_cells_no_cell_references_and_no_name_are_both_checked(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        def build(layout, name, x):
            layout.create_cell(name).shapes(layout.layer(2, 0)).insert(kdb.Box(x, 0, x + 1000, 1000))

        LAYOUT = kdb.Layout()
        for name, x in (("A", 0), ("B", 5000)):
            build(LAYOUT, name, x)
        """)
    assert tops == [("A", "not referenced by another cell", None), ("B", "not referenced by another cell", None)]


def test_a_cell_written_with_cell_write_is_the_only_top_and_names_the_write_line(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        def leftovers(layout):
            layout.create_cell("SCRATCH").shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))

        layout = kdb.Layout()
        leftovers(layout)
        chip = layout.create_cell("CHIP")
        chip.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 100, 100))
        chip.write("chip.gds")
        """)
    assert tops == [("CHIP", "written by the script to chip.gds", 10)]


def test_layout_write_names_the_selected_cell_or_else_every_unreferenced_one(tmp_path):
    body = """\
        import klayout.db as kdb

        layout = kdb.Layout()
        for name in ("ONE", "TWO"):
            layout.create_cell(name).shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        options = kdb.SaveLayoutOptions()
        {select}
        layout.write("out.oas", options)
        """
    _run, selected, _ = checked(tmp_path, body.format(select="options.select_cell(layout.cell_by_name('TWO'))"))
    assert selected == [("TWO", "written by the script to out.oas", 8)]
    _run, everything, _ = checked(tmp_path, body.format(select="pass"))
    assert everything == [("ONE", "written by the script to out.oas", 8), ("TWO", "written by the script to out.oas", 8)]


def test_a_module_level_name_beats_a_cell_no_name_holds(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        layout = kdb.Layout()
        def scratch():
            layout.create_cell("SCRATCH").shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        scratch()
        top = layout.create_cell("TOP")
        leaf = layout.create_cell("LEAF")
        leaf.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        top.insert(kdb.CellInstArray(leaf.cell_index(), kdb.Trans()))
        """)
    assert tops == [("TOP", "assigned to top at module level", 7)]


def test_a_cell_shown_at_module_level_beats_the_assigned_ones(tmp_path):
    # A wrapper with kdb_cell and show() is the interface kfactory's KCell gives.
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        class Shown:
            def __init__(self, cell):
                self.kdb_cell = cell
            def show(self):
                pass

        layout = kdb.Layout()
        other = layout.create_cell("OTHER")
        other.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        view = Shown(layout.create_cell("VIEWED"))
        view.kdb_cell.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        if __name__ == "__main__":
            view.show()
        """)
    assert tops == [("VIEWED", "shown by the script", 15)]


def test_a_show_names_the_cell_it_writes_not_the_library_layouts_written_beside_it(tmp_path):
    # kfactory's show writes the cell for the viewer with Cell.write, and every other layout whole.
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        library = kdb.Layout()
        library.create_cell("LIBCELL").shapes(library.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        def show(cell):
            cell.write("view.oas")
            library.write("library.oas")
        layout = kdb.Layout()
        layout.create_cell("CHIP").shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        show(layout.cell("CHIP"))
        """)
    assert tops == [("CHIP", "shown by the script", 6)]


def test_the_cell_a_main_entry_returns_beats_the_cached_ones_beside_it(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        def place(layout, name):
            cell = layout.create_cell(name)
            cell.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
            return cell

        def main():
            layout = kdb.Layout()
            place(layout, "CACHED")
            top = layout.create_cell("TOP")
            top.insert(kdb.CellInstArray(place(layout, "LEAF").cell_index(), kdb.Trans()))
            return top

        if __name__ == "__main__":
            main()
        """)
    assert tops == [("TOP", "returned by main()", 16)]


def test_a_helper_called_at_module_level_is_no_entry(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import klayout.db as kdb

        LAYOUT = kdb.Layout()
        def place(name):
            cell = LAYOUT.create_cell(name)
            cell.shapes(LAYOUT.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
            return cell

        place("A")
        place("B")
        """)
    assert [(name, reason) for name, reason, _line in tops] == [("A", "not referenced by another cell"),
                                                                ("B", "not referenced by another cell")]


def test_gdstk_library_write_names_its_cells_not_a_stray_one(tmp_path):
    pytest.importorskip("gdstk")
    _run, tops, _ = checked(tmp_path, """\
        import gdstk

        stray = gdstk.Cell("STRAY")
        stray.add(gdstk.rectangle((0, 0), (1, 1), layer=2))
        lib = gdstk.Library()
        top, leaf = lib.new_cell("TOP"), lib.new_cell("LEAF")
        leaf.add(gdstk.rectangle((0, 0), (1, 1), layer=2))
        top.add(gdstk.Reference(leaf))
        lib.write_gds("out.gds")
        """)
    assert tops == [("TOP", "written by the script to out.gds", 9)]


def test_a_klayout_written_gds_is_checked_from_its_real_top(tmp_path):
    layout = kdb.Layout()
    top, leaf = layout.create_cell("TOP"), layout.create_cell("LEAF")
    leaf.shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 100, 100))
    top.insert(kdb.CellInstArray(leaf.cell_index(), kdb.Trans()))
    leaf.add_meta_info(kdb.LayoutMetaInfo("width", 1.5, None, True))  # persisted: a context-info cell
    path = tmp_path / "written.gds"
    layout.write(str(path))
    outcome = read_layout_file(path, "gds")
    result = check_outcome(outcome, DEMO, rules=select_rules(["no-geometry"]))
    assert [(t.name, t.reason) for t in result.tops] == [("TOP", "not referenced by another cell")]


def test_a_library_without_capture_is_named_as_a_warning(tmp_path):
    # A stand-in for phidl: what the rule sees is the import, and that nothing was captured.
    (tmp_path / "phidl").mkdir()
    (tmp_path / "phidl" / "__init__.py").write_text("class Device:\n    pass\n")
    run, tops, (finding,) = checked(tmp_path, """\
        from phidl import Device
        D = Device()
        """)
    assert run.layout.imports == ("phidl",) and tops == []
    assert finding.severity is Severity.WARNING and finding.message.startswith("no capture for library phidl:")


def test_a_capture_that_fails_is_an_error_not_a_pass(tmp_path):
    outcome, tops, (finding,) = checked(tmp_path, """\
        import klayout.db as kdb
        layout = kdb.Layout()
        layout.create_cell("TOP").shapes(layout.layer(2, 0)).insert(kdb.Box(0, 0, 10, 10))
        kdb.Shape.is_valid = lambda shape: 1 / 0  # the collection asks every logged shape
        """, rules=["script-error"])
    assert outcome.failure.stage == "capture" and tops == []
    assert finding.rule == "script-error" and finding.severity is Severity.ERROR
    assert "latchwatch failed to capture its layout (ZeroDivisionError" in finding.message


@needs_gdsfactory
def test_gdsfactory_writes_only_top_and_only_top_is_checked(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import gdsfactory as gf

        gf.gpdk.PDK.activate()
        s = gf.components.straight(length=10, width=0.5)
        r = gf.components.rectangle(size=(4, 4), layer=(2, 0))
        b = gf.boolean(r, s, operation="not", layer=(2, 0))
        top = gf.Component("top")
        top << b
        top << gf.components.straight(length=3)
        top.write_gds("top.gds")
        """, python=GF9_PYTHON)
    assert tops == [("top", "written by the script to top.gds", 10)]


@needs_gdsfactory
def test_gdsfactory_show_of_a_cached_cell_function_names_it(tmp_path):
    _run, tops, _ = checked(tmp_path, """\
        import gdsfactory as gf

        gf.gpdk.PDK.activate()

        @gf.cell
        def chip() -> gf.Component:
            c = gf.Component()
            r = gf.components.rectangle(size=(4, 4), layer=(2, 0))
            c << gf.boolean(r, gf.components.straight(length=10), operation="not", layer=(2, 0))
            return c

        if __name__ == "__main__":
            chip().show()
        """, python=GF9_PYTHON)
    assert tops == [("chip", "shown by the script", 13)]


@needs_gdsfactory
def test_a_gds_gdsfactory_wrote_is_checked_from_its_top_not_its_context_cell(tmp_path):
    import subprocess

    script = tmp_path / "write.py"
    script.write_text(textwrap.dedent("""\
        import gdsfactory as gf
        gf.gpdk.PDK.activate()
        top = gf.Component("top")
        top << gf.components.straight(length=3)
        top.write_gds("top.gds")
        """), encoding="utf-8")
    subprocess.run([GF9_PYTHON, str(script)], cwd=tmp_path, check=True, capture_output=True, timeout=120)
    outcome = read_layout_file(tmp_path / "top.gds", "gds")
    names = [cell.name for cell in outcome.layout.cells]
    result = check_outcome(outcome, DEMO, rules=select_rules(["no-geometry"]))
    assert [(t.name, t.reason) for t in result.tops] == [("top", "not referenced by another cell")]
    if importlib.util.find_spec("gdstk") is not None:  # gdstk reads the context cell as a cell (KLayout consumes it)
        assert "$$$CONTEXT_INFO$$$" in names
