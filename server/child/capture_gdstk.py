"""Capture for gdstk: ``gdstk.Cell`` and ``gdstk.Library`` replaced by logging subclasses.

Every ``cell.add(...)`` logs the caller's stack. Logging is kept cheap because
generators call ``add`` hundreds of thousands of times: one record per call holds the
caller's code object and instruction offset, the offset of the frame above it, and a
cached id for the chain of frames further out. That chain is cached on the live frame
object: while a frame runs, its callers are suspended at fixed positions, so the chain
above it cannot change. Lines are resolved once per unique position, at the end.
"""

from __future__ import annotations

import sys

import gdstk

from .stacks import _GENERATOR_FLAGS, HARNESS_FILES, STACK_DEPTH

BaseCell = gdstk.Cell if gdstk else None


BaseLibrary = gdstk.Library if gdstk else None


class Recorder:
    """Per-run state of the patched gdstk classes."""

    def __init__(self, depth=STACK_DEPTH):
        self.outer_depth = max(depth - 2, 0)
        self.created = []  # cells in creation order
        self.libraries = []
        self.side_logs = {}  # id(cell) -> (cell, log) for cells without a _lw_log
        self.fallback = {}  # id(cell) -> record used for elements nobody logged
        self.copies = {}  # id(copied cell) -> (source cell, its element lists at copy time)
        # chain id -> (code of the frame above the caller, ((code, lasti), ...) further out)
        self.chains = [(None, ())]
        self.chain_index = {}
        self.chain_of_frame = {}
        self.sweep_at = 4096

    def chain_id(self, frame):
        """Chain id for the frames from ``frame`` outwards (slow path, cached)."""
        if frame is None:
            return 0
        if frame.f_code.co_filename in HARNESS_FILES:
            self.chain_of_frame[frame] = 0
            return 0
        outer = []
        above = frame.f_back
        while above is not None and len(outer) < self.outer_depth:
            code = above.f_code
            if code.co_filename in HARNESS_FILES:
                break
            outer.append((code, above.f_lasti))
            above = above.f_back
        key = (id(frame.f_code), tuple((id(code), lasti) for code, lasti in outer))
        cid = self.chain_index.get(key)
        if cid is None:
            cid = self.chain_index[key] = len(self.chains)
            self.chains.append((frame.f_code, tuple(outer)))
        # A generator frame can be resumed from elsewhere: its callers are not fixed.
        if not frame.f_code.co_flags & _GENERATOR_FLAGS:
            if len(self.chain_of_frame) >= self.sweep_at:
                self._sweep()
            self.chain_of_frame[frame] = cid
        return cid

    def _sweep(self):
        """Forget finished frames, so the cache does not keep their locals alive."""
        for frame in list(self.chain_of_frame):
            # References: the dict key, the list, the loop variable and the argument.
            # A running frame has one more, held by the interpreter.
            if sys.getrefcount(frame) <= 4:
                del self.chain_of_frame[frame]
        self.sweep_at = max(4096, 2 * len(self.chain_of_frame))

    def record_slow(self, cell, elements, depth=2):
        """Log an add whose fast path failed (odd caller, cell without a log)."""
        try:
            frame = sys._getframe(depth)
        except ValueError:
            record = (elements, None, -1, -1, 0)
        else:
            above = frame.f_back
            cid = self.chain_id(above)
            record = (elements, frame.f_code, frame.f_lasti, above.f_lasti if above else -1, cid)
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

    for cls in (Cell, Library):
        cls.__module__ = "gdstk"
        cls.__qualname__ = cls.__name__
    gdstk.Cell = Cell
    gdstk.Library = Library

