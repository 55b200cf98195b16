"""Call stacks of the user's code, interned: frames, stacks, tracebacks.

Frames of this package are the harness, never the user's: they are left out of every
stack (compared by the compiled file name, in HARNESS_FILES).
"""

from __future__ import annotations

import os
import sys

# Frames of this file are the harness, never the user's: compare the compiled name.
_HERE = os.path.dirname(sys._getframe().f_code.co_filename)
HARNESS_FILES = frozenset(os.path.join(_HERE, name) for name in os.listdir(_HERE) if name.endswith(".py"))


STACK_DEPTH = 16


_GENERATOR_FLAGS = 0x20 | 0x80 | 0x200  # CO_GENERATOR, CO_COROUTINE, CO_ASYNC_GENERATOR


class StackTables:
    """Interned frames and stacks, shared by every cell of one capture."""

    def __init__(self):
        self.frames = []  # [file, line, function, column, end_line, end_column]
        self.stacks = []  # tuples of frame ids, innermost first
        self._frame_index = {}
        self._stack_index = {}
        self._position_frames = {}  # (id(code), lasti) -> frame id
        self._code_positions = {}
        self._keep = []  # code objects whose ids are keys above

    def frame_id(self, code, lasti):
        """The interned frame id of a code object at an instruction offset."""
        key = (id(code), lasti)
        fid = self._position_frames.get(key)
        if fid is None:
            self._keep.append(code)
            line, column, end_line, end_column = self._position(code, lasti)
            frame = (code.co_filename, line, code.co_name, column, end_line, end_column)
            fid = self._frame_index.get(frame)
            if fid is None:
                fid = self._frame_index[frame] = len(self.frames)
                self.frames.append(list(frame))
            self._position_frames[key] = fid
        return fid

    def line_frame(self, file, line, function="<module>"):
        """The interned frame id of a line known from the source, not from a running frame."""
        frame = (file, line, function, None, None, None)
        fid = self._frame_index.get(frame)
        if fid is None:
            fid = self._frame_index[frame] = len(self.frames)
            self.frames.append(list(frame))
        return fid

    def stack_id(self, frame_ids):
        """The interned stack id of a sequence of frame ids, innermost first."""
        frame_ids = tuple(frame_ids)
        sid = self._stack_index.get(frame_ids)
        if sid is None:
            sid = self._stack_index[frame_ids] = len(self.stacks)
            self.stacks.append(frame_ids)
        return sid

    def _position(self, code, lasti):
        """1-based line and columns of the instruction at byte offset lasti."""
        positions = self._code_positions.get(code)
        if positions is None:
            positions = self._code_positions[code] = _code_positions(code)
        kind, positions = positions
        if kind == "positions":
            index = lasti // 2
            if 0 <= index < len(positions):
                line, end_line, column, end_column = positions[index]
                if line is not None:
                    return (line, _char_column(code.co_filename, line, column),
                            end_line, _char_column(code.co_filename, end_line, end_column))
            return (code.co_firstlineno, None, None, None)
        line = code.co_firstlineno
        for start, candidate in positions:  # (offset, line) pairs, ascending
            if start > lasti:
                break
            if candidate is not None:
                line = candidate
        return (line, None, None, None)


def _code_positions(code):
    if hasattr(code, "co_positions"):  # Python 3.11+: one entry per 2-byte code unit
        return "positions", list(code.co_positions())
    if hasattr(code, "co_lines"):  # Python 3.10
        return "lines", [(start, line) for start, _end, line in code.co_lines()]
    import dis

    return "lines", list(dis.findlinestarts(code))


def _char_column(filename, line, byte_column):
    """co_positions counts UTF-8 bytes from 0; frames count characters from 1."""
    if byte_column is None or line is None:
        return None
    import linecache

    text = linecache.getline(filename, line)
    if text and not text.isascii():
        return len(text.encode("utf-8")[:byte_column].decode("utf-8", "replace")) + 1
    return byte_column + 1


TRACEBACK_KEEP = (150, 50)  # innermost and outermost frames kept of a deeper traceback


def traceback_frames(tb, tables):
    """Frame ids of a traceback, innermost first, harness frames left out.

    Every frame is kept (the checker picks the user's), except that a runaway
    recursion keeps only its innermost and outermost frames.
    """
    entries = []
    while tb is not None:
        code = tb.tb_frame.f_code
        if code.co_filename not in HARNESS_FILES:
            entries.append((code, tb.tb_lasti))
        tb = tb.tb_next
    entries.reverse()
    inner, outer = TRACEBACK_KEEP
    if len(entries) > inner + outer:
        entries = entries[:inner] + entries[-outer:]
    return [tables.frame_id(code, lasti) for code, lasti in entries]
