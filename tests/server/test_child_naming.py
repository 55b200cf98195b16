"""The child's reading of the script (server/child/naming.py): pure functions on source text."""

import ast
import textwrap
import traceback

import pytest

from latchwatch.server.child.naming import RETURN_HOOK, EntryReturns, ModuleScan, with_entry_returns

SOURCE = textwrap.dedent("""\
    import gdsfactory as gf
    from klayout import db

    def main():
        return 7

    def helper():
        return 8

    helper()
    main()
    chip = main()
    if __name__ == "__main__":
        helper()
        chip.show()
        gf.show(chip)
    else:
        helper()
    """)


def test_main_and_calls_under_the_main_guard_are_entries_helpers_elsewhere_are_not():
    tree = with_entry_returns(ast.parse(SOURCE))
    hooked = [(node.lineno, node.value.args[1].value) for node in ast.walk(tree)
              if isinstance(node, ast.Expr) and isinstance(node.value, ast.Call)
              and getattr(node.value.func, "id", None) == RETURN_HOOK]
    assert hooked == [(11, "main"), (14, "helper")]
    namespace = {RETURN_HOOK: EntryReturns(), "__name__": "__main__"}
    runnable = SOURCE.split("\n", 2)[2].replace("chip.show()", "pass").replace("gf.show(chip)", "pass")
    exec(compile(with_entry_returns(ast.parse(runnable)), "gen.py", "exec"), namespace)
    assert [(value, name) for value, name, _line in namespace[RETURN_HOOK].values] == [(7, "main"), (8, "helper")]


def test_a_script_without_entries_is_left_alone():
    assert with_entry_returns(ast.parse("def f():\n    return 1\nf()\nx = f()\n")) is None


def test_an_entry_that_raises_keeps_its_line_in_the_traceback():
    source = "def main():\n    return 1 / 0\n\nmain()\n"
    namespace = {RETURN_HOOK: EntryReturns()}
    with pytest.raises(ZeroDivisionError) as raised:
        exec(compile(with_entry_returns(ast.parse(source)), "gen.py", "exec"), namespace)
    frames = traceback.extract_tb(raised.value.__traceback__)
    lines = [(frame.name, frame.lineno) for frame in frames if frame.filename == "gen.py"]
    assert lines == [("<module>", 4), ("main", 2)]


def test_the_scan_finds_assignments_shows_and_imports():
    scan = ModuleScan(SOURCE)
    assert scan.assigned == {"chip": 12}
    assert scan.shown == [("chip", 15), ("gf", 16), ("chip", 16)]
    assert {"gdsfactory", "klayout"} <= scan.imports


def test_a_script_that_does_not_parse_names_nothing():
    scan = ModuleScan("def broken(:\n")
    assert (scan.assigned, scan.shown, scan.imports) == ({}, [], set())
