"""What the script itself says its layout is: the cells it writes, shows or assigns at module level.

The capture backends note each write of a layout file as it happens (``note_written``,
called from the patched gdstk ``Library.write_gds``/``write_oas`` and KLayout
``Cell.write``/``Layout.write``); a write made inside a ``show`` or ``plot`` (kfactory's
``show`` writes a file for the viewer) counts as showing. After the run, the module's
names are read: a cell bound to a module-level name is assigned, and a module-level
``X.show()``/``X.plot()``/``show(X)`` call shows the cell bound to ``X``. The parent picks
the tops from these (analyzers/layout/tops.py); this module only reports them, with
the file's imports of layout libraries. Standard library only, Python 3.8 and later.
"""

from __future__ import annotations

import ast
import os
import sys

from .stacks import HARNESS_FILES

# Layout libraries a script may import, latchwatch's captured ones and others; the
# parent decides which it captures (analyzers/rules/no_geometry.py).
LAYOUT_LIBRARIES = ("gdstk", "klayout", "pya", "gdsfactory", "kfactory", "phidl", "gdspy", "nazca", "gdshelpers",
                    "picwriter")
SHOW_NAMES = ("show", "plot")
EVENT_DEPTH = 64  # frames kept of a write's stack: rare events, so the whole way out to the script


def note_written(log, targets, filename):
    """Log a write of ``targets`` to ``filename`` with the caller's stack (writes in a show are shows).

    ``targets``: ("gdstk", cell) and ("klayout", layout, cell index or None for all its cells)."""
    frames = []
    frame = sys._getframe(1)
    while frame is not None and len(frames) < EVENT_DEPTH:
        code = frame.f_code
        if code.co_filename not in HARNESS_FILES:
            frames.append((code, frame.f_lasti))
        frame = frame.f_back
    how = "shown" if any(code.co_name in SHOW_NAMES for code, _lasti in frames) else "written"
    if how == "shown":  # kfactory's show writes the shown cell, and whole library layouts beside it for the viewer
        targets = [target for target in targets if not (target[0] == "klayout" and target[2] is None)]
    detail = os.path.basename(os.fspath(filename)) if isinstance(filename, (str, os.PathLike)) else ""
    log.append((how, targets, detail, frames))


def file_argument(args, kwargs, keyword):
    """The file name a write was given, positionally or as ``keyword``."""
    return args[0] if args else kwargs.get(keyword)


class ModuleScan:
    """One parse of the script: module-level assignment lines, show/plot calls, layout imports."""

    def __init__(self, source_text):
        self.assigned = {}  # name -> line of its last module-level assignment
        self.shown = []  # (name, line) of module-level show/plot calls
        self.imports = set()
        try:
            tree = ast.parse(source_text)
        except (SyntaxError, ValueError):
            return
        self._visit_block(tree.body)
        for node in ast.walk(tree):  # imports anywhere, functions included
            if isinstance(node, ast.Import):
                self.imports.update(alias.name.split(".")[0] for alias in node.names)
            elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
                self.imports.add(node.module.split(".")[0])

    def _visit_block(self, body):
        for node in body:
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                continue
            if isinstance(node, (ast.Assign, ast.AnnAssign, ast.AugAssign)):
                targets = node.targets if isinstance(node, ast.Assign) else [node.target]
                for target in targets:
                    for name in ast.walk(target):
                        if isinstance(name, ast.Name):
                            self.assigned[name.id] = node.lineno
            for child in ast.walk(node) if isinstance(node, ast.Expr) else ():
                self._note_show(child)
            for field in ("body", "orelse", "finalbody", "handlers"):  # if, for, while, with, try
                block = getattr(node, field, None)
                if isinstance(block, list):
                    self._visit_block(block)

    def _note_show(self, node):
        if not isinstance(node, ast.Call):
            return
        function = node.func
        called = function.attr if isinstance(function, ast.Attribute) else getattr(function, "id", None)
        if called not in SHOW_NAMES:
            return
        # c.show(), gf.show(c), show(c): the names that hold no cell (gf) drop out later
        if isinstance(function, ast.Attribute) and isinstance(function.value, ast.Name):
            self.shown.append((function.value.id, node.lineno))
        if node.args and isinstance(node.args[0], ast.Name):
            self.shown.append((node.args[0].id, node.lineno))


RETURN_HOOK = "__latchwatch_entry_returned__"  # bound in the script's namespace while it runs


def _is_main_guard(node):
    """``if __name__ == "__main__":``"""
    test = getattr(node, "test", None)
    return (isinstance(node, ast.If) and isinstance(test, ast.Compare) and isinstance(test.left, ast.Name)
            and test.left.id == "__name__" and len(test.comparators) == 1
            and isinstance(test.comparators[0], ast.Constant) and test.comparators[0].value == "__main__")


def with_entry_returns(tree):
    """The module ``tree`` with its main()-style calls passed through RETURN_HOOK, so the cells they
    return are seen; None when it has none. Lines and columns stay.

    A main()-style call is a statement that calls one of the module's own functions and drops the
    value: ``main()`` anywhere at module level, any such call under ``if __name__ == "__main__":``.
    Helpers called at module level (``place(top, leaf)``) are no entries, whatever they return."""
    defined = {node.name for node in tree.body if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))}
    found = []

    def is_entry(value, guarded):
        return (isinstance(value, ast.Call) and isinstance(value.func, ast.Name) and value.func.id in defined
                and (guarded or value.func.id == "main"))

    def visit(body, guarded):
        for node in body:
            value = getattr(node, "value", None) if isinstance(node, ast.Expr) else None
            if is_entry(value, guarded):
                hook = ast.Call(func=ast.Name(id=RETURN_HOOK, ctx=ast.Load()),
                                args=[value, ast.Constant(value=value.func.id), ast.Constant(value=node.lineno)],
                                keywords=[])
                node.value = ast.fix_missing_locations(ast.copy_location(hook, value))
                found.append(node)
            elif not isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                for field in ("body", "orelse", "finalbody", "handlers"):
                    block = getattr(node, field, None)
                    if isinstance(block, list):
                        visit(block, guarded or (field == "body" and _is_main_guard(node)))

    visit(tree.body, False)
    return tree if found else None


def module_events(scan, namespace, targets_of):
    """(how, targets, detail, line) of the module's shown and assigned cells, shown first.

    ``targets_of(value)`` gives the targets a value stands for, or None for a value that is no cell."""
    events = []
    for value, function, line in namespace.get(RETURN_HOOK, EntryReturns()).values:
        for item in value if isinstance(value, (list, tuple)) else [value]:
            targets = targets_of(item)
            if targets:
                events.append(("returned", targets, function, line))
    for name, line in scan.shown:
        targets = targets_of(namespace.get(name))
        if targets:
            events.append(("shown", targets, name, line))
    for name, value in list(namespace.items()):  # a daemon thread of the script may still bind names
        if name.startswith("__"):  # RETURN_HOOK among them
            continue
        targets = targets_of(value)
        if targets:
            events.append(("assigned", targets, name, scan.assigned.get(name)))
    return events


class EntryReturns:
    """RETURN_HOOK: keeps what each wrapped module-level call returned, and returns it unchanged."""

    def __init__(self):
        self.values = []  # (value, function name, line)

    def __call__(self, value, function, line):
        self.values.append((value, function, line))
        return value


def imported_libraries(scan, preloaded):
    """The layout libraries the script imported: in its own import statements, or loaded while it ran."""
    loaded = {name.split(".")[0] for name in list(sys.modules)} - preloaded  # a daemon thread may import
    return sorted(name for name in LAYOUT_LIBRARIES if name in scan.imports or name in loaded)
