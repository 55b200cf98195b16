"""Capture for gdstk: ``gdstk.Cell`` and ``gdstk.Library`` replaced by logging subclasses.

Every ``cell.add(...)`` logs the caller's stack, in the cheap records of
child/recording.py: generators call ``add`` hundreds of thousands of times.
"""

from __future__ import annotations

import sys

import gdstk

from .naming import file_argument, note_written
from .recording import StackRecorder
from .stacks import STACK_DEPTH

BaseCell = gdstk.Cell if gdstk else None


BaseLibrary = gdstk.Library if gdstk else None


class Recorder(StackRecorder):
    """Per-run state of the patched gdstk classes."""

    def __init__(self, depth=STACK_DEPTH):
        super().__init__(depth)
        self.created = []  # cells in creation order
        self.libraries = []
        self.side_logs = {}  # id(cell) -> (cell, log) for cells without a _lw_log
        self.fallback = {}  # id(cell) -> record used for elements nobody logged
        self.copies = {}  # id(copied cell) -> (source cell, its element lists at copy time)

    def record_slow(self, cell, elements, depth=3):
        """Log an add whose fast path failed (odd caller, cell without a log)."""
        record = self.caller_record(elements, depth)
        self.log_of(cell).append(record)
        return record

    def log_of(self, cell):
        log = getattr(cell, "_lw_log", None)
        if log is None:
            log = self.side_logs.setdefault(id(cell), (cell, []))[1]
        return log

    def register(self, cell):
        self.created.append(cell)


_recorder = None


def install(recorder):
    """Replace gdstk.Cell and gdstk.Library by logging subclasses."""
    global _recorder
    _recorder = recorder
    getframe = sys._getframe
    base_add = BaseCell.add
    chain_of_frame = recorder.chain_of_frame
    chain_id = recorder.chain_id

    class _Compat(type):
        # Cells read from files are plain gdstk cells: keep isinstance(x, gdstk.Cell)
        # true for them. Only our two classes relax the check, not user subclasses.
        def __instancecheck__(cls, obj):
            base = cls.__dict__.get("_lw_base")
            return isinstance(obj, base) if base else type.__instancecheck__(cls, obj)

        def __subclasscheck__(cls, sub):
            base = cls.__dict__.get("_lw_base")
            return issubclass(sub, base) if base else type.__subclasscheck__(cls, sub)

    class Cell(BaseCell, metaclass=_Compat):
        __doc__ = BaseCell.__doc__
        _lw_base = BaseCell

        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self._lw_log = []
            recorder.register(self)

        def add(self, *elements):
            result = base_add(self, *elements)
            if not elements:
                return result
            try:
                caller = getframe(1)
                above = caller.f_back
                cid = chain_of_frame.get(above)
                if cid is None:
                    cid = chain_id(above)
                self._lw_log.append((elements, caller.f_code, caller.f_lasti, above.f_lasti, cid))
            except Exception:
                recorder.record_slow(self, elements)
            return result

        def copy(self, *args, **kwargs):
            snapshot = {"polygons": self.polygons, "paths": self.paths, "labels": self.labels,
                         "references": self.references}
            duplicate = BaseCell.copy(self, *args, **kwargs)
            recorder.register(duplicate)
            recorder.copies[id(duplicate)] = (self, snapshot)
            recorder.fallback[id(duplicate)] = recorder.record_slow(duplicate, ())
            return duplicate

        def flatten(self, *args, **kwargs):
            result = BaseCell.flatten(self, *args, **kwargs)
            recorder.fallback[id(self)] = recorder.record_slow(self, ())
            return result

    class Library(BaseLibrary, metaclass=_Compat):
        __doc__ = BaseLibrary.__doc__
        _lw_base = BaseLibrary

        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            recorder.libraries.append(self)

        def new_cell(self, name):
            cell = Cell(name)
            self.add(cell)
            return cell

        def write_gds(self, *args, **kwargs):
            result = BaseLibrary.write_gds(self, *args, **kwargs)
            note_written(recorder.written, [("gdstk", cell) for cell in self.cells],
                         file_argument(args, kwargs, "outfile"))
            return result

        def write_oas(self, *args, **kwargs):
            result = BaseLibrary.write_oas(self, *args, **kwargs)
            note_written(recorder.written, [("gdstk", cell) for cell in self.cells],
                         file_argument(args, kwargs, "outfile"))
            return result

    for cls in (Cell, Library):
        cls.__module__ = "gdstk"
        cls.__qualname__ = cls.__name__
    gdstk.Cell = Cell
    gdstk.Library = Library

