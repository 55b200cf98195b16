"""The probe's function-call mode (``run_script(call=...)``): the script is imported as
a module, the function called with the corner's keyword arguments, and what it returns
is checked."""

import textwrap

import pytest

from latchwatch.server.sandbox.runner import run_script

GENERATOR = """\
import gdstk

def unit(name):
    cell = gdstk.Cell(name)
    cell.add(gdstk.rectangle((0, 0), (1, 1), layer=2))
    return cell

def fingers(n=2, w=1.0, as_library=False, as_list=False):
    cell = gdstk.Cell(f"F{n}")
    scratch = gdstk.Cell("SCRATCH")  # created, not returned: not checked
    scratch.add(gdstk.rectangle((0, 0), (9, 9), layer=9))
    for i in range(n):
        cell.add(gdstk.rectangle((2 * i, 0), (2 * i + 1, w), layer=2))
    cell.add(gdstk.Reference(unit("U"), (0, 5)))
    if as_library:
        lib = gdstk.Library("L", unit=1e-9)
        lib.add(cell, *cell.dependencies(True))
        return lib
    return [cell, unit("EXTRA")] if as_list else cell

def nothing(x=1):
    return x * 2

def broken(n=1):
    return 1 / (n - 1)

if __name__ == "__main__":
    raise SystemExit("run as __main__: the call mode must not get here")
"""


def _line_of(text):
    return next(n for n, line in enumerate(GENERATOR.splitlines(), 1) if text in line)


@pytest.fixture
def script(tmp_path):
    path = tmp_path / "cells.py"
    path.write_text(textwrap.dedent(GENERATOR), encoding="utf-8")
    return path


def test_call_collects_the_returned_cell_and_what_it_references(script):
    outcome = run_script(script, call=("fingers", {"n": 3, "w": 2.5}))
    assert outcome.status == "ok", outcome.failure
    assert [c.name for c in outcome.layout.cells] == ["F3", "U"]  # SCRATCH left out
    assert outcome.layout.top_cells() == [0]
    assert outcome.layout.cells[0].polygon_count == 3
    top_y = outcome.layout.cells[0].points[:, 1].max()
    assert top_y == 2.5


def test_call_stacks_point_into_the_function(script):
    outcome = run_script(script, call=("fingers", {"n": 1}))
    layout = outcome.layout
    frames = layout.stack_frames(int(layout.cells[0].poly_stack[0]))
    assert (frames[0].function, frames[0].line) == ("fingers", _line_of("2 * i + 1"))


def test_call_accepts_a_library_and_a_list(script):
    library = run_script(script, call=("fingers", {"as_library": True}))
    assert sorted(c.name for c in library.layout.cells) == ["F2", "U"]
    assert library.layout.unit == 1e-9
    listed = run_script(script, call=("fingers", {"as_list": True}))
    assert [c.name for c in listed.layout.cells] == ["F2", "EXTRA", "U"]
    assert [listed.layout.cells[i].name for i in listed.layout.top_cells()] == ["F2", "EXTRA"]


def test_a_value_that_is_no_layout_is_an_error_on_the_def_line(script):
    outcome = run_script(script, call=("nothing", {"x": 4}))
    assert outcome.status == "error"
    assert outcome.failure.exc_type == "TypeError"
    assert outcome.failure.message == ("nothing(x=4) returned int, not a gdstk.Cell or Library, "
                                       "a klayout.db.Cell or Layout, or a list of them")
    assert (outcome.failure.frames[0].line, outcome.failure.frames[0].function) == (_line_of("def nothing"), "nothing")


def test_a_value_that_is_no_layout_collects_nothing_when_accepted(script):
    outcome = run_script(script, call=("nothing", {}), accept_non_layout=True)
    assert outcome.status == "ok" and outcome.layout.cells == []


def test_a_raising_call_reports_its_traceback(script):
    outcome = run_script(script, call=("broken", {}))
    assert outcome.status == "error" and outcome.failure.exc_type == "ZeroDivisionError"
    assert outcome.failure.frames[0].line == _line_of("1 / (n - 1)")


def test_a_missing_function_is_named(script):
    outcome = run_script(script, call=("finger_array", {}))
    assert outcome.status == "error"
    assert "defines no function named 'finger_array'" in outcome.failure.message


def test_the_module_is_named_after_the_file(tmp_path):
    path = tmp_path / "named.py"
    path.write_text("import gdstk\n\ndef top():\n    return gdstk.Cell(__name__)\n", encoding="utf-8")
    outcome = run_script(path, call=("top", {}))
    assert [c.name for c in outcome.layout.cells] == ["named"]


def test_unsaved_source_is_called(script):
    source = "import gdstk\n\ndef fingers(n=1):\n    return gdstk.Cell(f'EDITED{n}')\n"
    outcome = run_script(script, source=source, call=("fingers", {"n": 7}))
    assert [c.name for c in outcome.layout.cells] == ["EDITED7"]
