"""The capture backends of a run: gdstk when it is installed, KLayout when the script imports it.

gdstk is imported with this module (a corner host then forks with it loaded) and its
classes are replaced before the script runs. klayout is only looked for: its capture
is installed when the script's import of it has run (child/capture_klayout.py), so
neither library is required, and a script may use both (their cells go into one
layout, their stacks into one table). numpy is required: the arrays are numpy's.
"""

from __future__ import annotations

import importlib.util
import sys
import types

from . import naming
from .capture_klayout import DATABASE_MODULE, ImportWatch, KlayoutRecorder
from .stacks import StackTables
from .wire_format import layout_header

try:
    import numpy as np
except ImportError as error:
    np = None
    NUMPY_ERROR = error
else:
    NUMPY_ERROR = None

try:
    import gdstk

    from . import capture_gdstk, collect_gdstk
except ImportError:
    gdstk = None


def _klayout_installed():
    try:
        return importlib.util.find_spec("klayout") is not None
    except (ImportError, ValueError):
        return False


KLAYOUT_INSTALLED = _klayout_installed() if NUMPY_ERROR is None else False


def unusable_reason():
    """Why this interpreter cannot capture a layout, or None when it can."""
    if NUMPY_ERROR is not None:
        return "the interpreter %s cannot import numpy: %s" % (sys.executable, NUMPY_ERROR)
    if gdstk is None and not KLAYOUT_INSTALLED:
        return ("the interpreter %s has neither gdstk nor klayout, the layout libraries latchwatch captures"
                % sys.executable)
    return None


def versions():
    """``name=version`` words for the child's ``ready`` line: numpy and the layout libraries found."""
    words = ["numpy=%s" % np.__version__]
    if gdstk is not None:
        words.append("gdstk=%s" % getattr(gdstk, "__version__", "?"))
    if KLAYOUT_INSTALLED:
        words.append("klayout=on-import")  # not imported until a script does
    return words


def klayout_module():
    """klayout's database module when the script loaded it, else None."""
    return sys.modules.get(DATABASE_MODULE)


def is_gdstk_cell(item):
    """Whether ``item`` is a gdstk cell (never, where gdstk is missing)."""
    return gdstk is not None and isinstance(item, capture_gdstk.BaseCell)


def is_gdstk_library(item):
    """Whether ``item`` is a gdstk library (never, where gdstk is missing)."""
    return gdstk is not None and isinstance(item, capture_gdstk.BaseLibrary)


def klayout_cells_of(item):
    """The KLayout cells a returned value stands for (a Cell, a Layout's cells, a kfactory KCell), or None."""
    kdb = klayout_module()
    if kdb is None:
        return None
    if isinstance(item, kdb.Cell):
        return [item]
    if isinstance(item, kdb.Layout):
        return list(item.each_cell())
    wrapped = getattr(item, "kdb_cell", None)  # kfactory's KCell and gdsfactory's Component wrap one
    if isinstance(wrapped, kdb.Cell):
        return [wrapped]
    return None


def _assigned_targets(value):
    """The cells a module-level value is (a cell or a framework's wrapper of one), or None."""
    if isinstance(value, (type, types.ModuleType, types.FunctionType, types.BuiltinFunctionType)):
        return None
    try:
        if is_gdstk_cell(value):
            return [("gdstk", value)]
        wrapped = getattr(value, "_cell", None)  # gdsfactory 7's Component wraps a gdstk cell
        if is_gdstk_cell(wrapped):
            return [("gdstk", wrapped)]
        kdb = klayout_module()
        if kdb is None or isinstance(value, kdb.Layout):  # a whole layout names no cell of it
            return None
        cells = klayout_cells_of(value)
        return [("klayout", cell.layout(), cell.cell_index()) for cell in cells] if cells else None
    except Exception:  # a value whose attribute lookup fails (or a cell since destroyed) is no cell
        return None


class Capture:
    """The backends of one script run, installed; collects what they logged."""

    def __init__(self, depth):
        self.preloaded = {name.split(".")[0] for name in list(sys.modules)}
        self.written = []  # the files the script wrote, logged by both backends (child/naming.py)
        self.gdstk = None
        if gdstk is not None:
            self.gdstk = capture_gdstk.Recorder(depth)
            self.gdstk.written = self.written
            capture_gdstk.install(self.gdstk)
        self.klayout = KlayoutRecorder(depth)
        self.klayout.written = self.written
        if KLAYOUT_INSTALLED:
            ImportWatch(self.klayout).start()

    def collect(self, source, returned=None, module=None, source_text=""):
        """Header and arrays of the run: every cell created, or (``returned``) the cells a call returned.

        ``returned`` is (gdstk cells, gdstk unit or None, klayout cells, function name);
        ``module`` the script's namespace and ``source_text`` its text, read for the cells it names.
        """
        if self.klayout.install_error is not None:
            error = self.klayout.install_error
            raise RuntimeError("the capture of klayout could not be installed: %s: %s" % (type(error).__name__, error))
        tables = StackTables()
        recorder = self.gdstk
        if returned is not None:
            cells, unit, klayout_tops, function = returned
            unit = unit or 1e-6
        else:
            cells = collect_gdstk.captured_cells(recorder) if recorder is not None else []
            unit = recorder.libraries[0].unit if recorder is not None and recorder.libraries else 1e-6
            klayout_tops = None
        gdstk_positions, klayout_positions = {}, {}
        if cells:
            header, arrays = collect_gdstk.collect(cells, recorder, unit=unit, source=source, tables=tables,
                                                   positions=gdstk_positions)
        else:
            header, arrays = layout_header(unit, source, [], tables), []
        kdb = klayout_module()
        if kdb is not None and (self.klayout.used or klayout_tops):
            from .collect_klayout import add_layouts

            add_layouts(header, arrays, tables, self.klayout, kdb, tops=klayout_tops, positions=klayout_positions)
        scan = naming.ModuleScan(source_text)
        events = [(how, targets, detail, tables.stack_id([tables.frame_id(code, lasti) for code, lasti in frames]))
                  for how, targets, detail, frames in self.written]
        if module is not None:
            events.extend((how, targets, detail, tables.stack_id([tables.line_frame(source, line)]) if line else -1)
                          for how, targets, detail, line in naming.module_events(scan, module, _assigned_targets))
        if returned is not None:
            events[:0] = [("returned", [("gdstk", cell) for cell in cells]
                           + [("klayout", cell.layout(), cell.cell_index()) for cell in klayout_tops], function, -1)]
        header["named"] = _named_entries(events, gdstk_positions, klayout_positions)
        header["imports"] = naming.imported_libraries(scan, self.preloaded)
        header["stacks"] = [list(s) for s in tables.stacks]
        return header, arrays


def _named_entries(events, gdstk_positions, klayout_positions):
    """[header cell index, how, detail, stack id] of each collected cell an event names, in event order."""
    entries = []
    for how, targets, detail, stack in events:
        for target in targets:
            if target[0] == "gdstk":
                indices = [gdstk_positions.get(id(target[1]))]
            elif target[2] is None:  # a whole layout written
                key = id(target[1])
                indices = sorted(index for (layout, _cell), index in klayout_positions.items() if layout == key)
            else:
                indices = [klayout_positions.get((id(target[1]), target[2]))]
            entries.extend([index, how, detail, stack] for index in indices if index is not None)
    return entries


class LayoutFile:
    """A GDSII or OASIS file, read with gdstk when installed, else with KLayout; collected apart from reading."""

    def __init__(self, path, kind):
        self.path = path
        self.kind = kind  # "gds" or "oas"
        self.library = self.layout = None

    def read(self):
        """Read the file; raises OSError, RuntimeError or ValueError for one the library cannot read."""
        if gdstk is not None:
            self.library = (gdstk.read_gds if self.kind == "gds" else gdstk.read_oas)(self.path)
            return
        import klayout.db  # noqa: F401  (loads klayout.dbcore, the module used below)

        self.layout = klayout_module().Layout()
        self.layout.read(self.path)

    def collect(self):
        """Header and arrays of every cell read (no stacks: no line drew them)."""
        if self.library is not None:
            header, arrays = collect_gdstk.collect(self.library.cells, recorder=None, unit=self.library.unit,
                                                   source=self.path)
            header["precision"] = self.library.precision
            return header, arrays
        from .collect_klayout import add_layouts

        tables = StackTables()
        header = layout_header(1e-6, self.path, [], tables)
        return add_layouts(header, [], tables, KlayoutRecorder(), klayout_module(), layouts=[self.layout])
