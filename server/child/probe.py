"""Runs a layout script inside the child process and ships what it drew.

Loaded by server/sandbox_child.py once the child is confined, which then calls
``serve(config)``: the probe imports gdstk and numpy, says ``ready`` on the control
pipe and waits for its job on the job pipe (a JSON object, see options_from_job), so a
child can be started before its job is known (a corner host forks it, server/hosts.py,
after the imports). It must stay self-contained
(standard library, numpy and gdstk only): the interpreter may be the user's own, which
has gdstk but not latchwatch. Written for Python 3.8 and later. A job with ``call``
imports the script as a module instead (not as ``__main__``) and collects the
returned cells (parameter corners, see _call_generator).

Before the script runs, ``gdstk.Cell`` and ``gdstk.Library`` are replaced by
subclasses, so every ``cell.add(...)`` logs the caller's stack. Logging is kept cheap
because generators call ``add`` hundreds of thousands of times: one record per call
holds the caller's code object and instruction offset, the offset of the frame above
it, and a cached id for the chain of frames further out. That chain is cached on the
live frame object: while a frame runs, its callers are suspended at fixed positions,
so the chain above it cannot change. Lines are resolved once per unique position, at
the end.

Outcome protocol: the result pipe receives one payload, a JSON header followed by
raw array bytes (see encode_payload). The control pipe receives text lines:
``ready ...`` (imports done), ``started`` (job read), ``finished``, and on a timeout
the faulthandler stack dump. Standard output and error are the script's own.

Importable as ``latchwatch.server.probe`` for its collection functions (used to read
GDSII/OASIS files); importing it patches nothing.
"""

from __future__ import annotations

import faulthandler
import json
import os
import struct
import sys
from itertools import chain
from operator import attrgetter, itemgetter

try:
    import numpy as np
    import gdstk
except ImportError as error:  # reported by main(); the parent shows it as a script error
    np = gdstk = None
    _IMPORT_ERROR = error
else:
    _IMPORT_ERROR = None

# Frames of this file are the harness, never the user's: compare the compiled name.
PROBE_FILE = sys._getframe().f_code.co_filename
MAGIC = b"LWGEO01\n"
WIRE_VERSION = 1
STACK_DEPTH = 16
_ALIGN = 8
_GENERATOR_FLAGS = 0x20 | 0x80 | 0x200  # CO_GENERATOR, CO_COROUTINE, CO_ASYNC_GENERATOR

_BaseCell = gdstk.Cell if gdstk else None
_BaseLibrary = gdstk.Library if gdstk else None


# ---------------------------------------------------------------------------
# Wire format: MAGIC, u64 header length, JSON header, padding, then each array's raw
# bytes at the offset the header names (relative to the data start, 8-byte aligned).


def encode_payload(header, arrays):
    """Return the list of byte chunks for header plus arrays (numpy arrays or bytes)."""
    descriptors = []
    chunks = []
    offset = 0
    for array in arrays:
        if isinstance(array, (bytes, bytearray)):
            raw, dtype, shape = array, "|u1", [len(array)]
        else:
            array = np.ascontiguousarray(array)
            raw, dtype, shape = array.reshape(-1).view(np.uint8), array.dtype.str, list(array.shape)
        descriptors.append([dtype, shape, offset, len(raw)])
        chunks.append(raw)
        pad = -len(raw) % _ALIGN
        if pad:
            chunks.append(b"\0" * pad)
        offset += len(raw) + pad
    header = dict(header, arrays=descriptors, data_bytes=offset)
    text = json.dumps(header, separators=(",", ":")).encode("utf-8")
    text += b" " * (-(len(MAGIC) + 8 + len(text)) % _ALIGN)
    return [MAGIC, struct.pack("<Q", len(text)), text] + chunks


def write_payload(fd, header, arrays):
    with open(fd, "wb", closefd=False) as out:
        for chunk in encode_payload(header, arrays):
            out.write(chunk)


# ---------------------------------------------------------------------------
# Stack capture.


class _StackTables:
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

    def stack_id(self, frame_ids):
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


class _Recorder:
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
        if frame.f_code.co_filename == PROBE_FILE:
            self.chain_of_frame[frame] = 0
            return 0
        outer = []
        above = frame.f_back
        while above is not None and len(outer) < self.outer_depth:
            code = above.f_code
            if code.co_filename == PROBE_FILE:
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
    base_add = _BaseCell.add
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

    class Cell(_BaseCell, metaclass=_Compat):
        __doc__ = _BaseCell.__doc__
        _lw_base = _BaseCell

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
            duplicate = _BaseCell.copy(self, *args, **kwargs)
            recorder.register(duplicate)
            recorder.copies[id(duplicate)] = (self, snapshot)
            recorder.fallback[id(duplicate)] = recorder.record_slow(duplicate, ())
            return duplicate

        def flatten(self, *args, **kwargs):
            result = _BaseCell.flatten(self, *args, **kwargs)
            recorder.fallback[id(self)] = recorder.record_slow(self, ())
            return result

    class Library(_BaseLibrary, metaclass=_Compat):
        __doc__ = _BaseLibrary.__doc__
        _lw_base = _BaseLibrary

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


def uninstall():
    if gdstk is not None and _BaseCell is not None:
        gdstk.Cell = _BaseCell
        gdstk.Library = _BaseLibrary


# ---------------------------------------------------------------------------
# Collection: cells -> header + arrays.

_points = attrgetter("points")
_layer = attrgetter("layer")
_datatype = attrgetter("datatype")
_repetition_size = attrgetter("repetition.size")


def _i32(values=()):
    return np.asarray(values, dtype=np.int32).reshape(-1)


def _xy(values=()):
    return np.asarray(values, dtype=np.float64).reshape(-1, 2)


_record_elements = itemgetter(0)
_record_code = itemgetter(1)
_RECORD_INTS = (itemgetter(2), itemgetter(3), itemgetter(4))


class _CellLog:
    """The stacks of one cell's logged elements, keyed by element identity."""

    def __init__(self, records, tables, recorder, fallback=None):
        self.tables = tables
        self.recorder = recorder
        self.fallback = self._sid(fallback) if fallback is not None else -1
        self._sorted = None
        self.copy_of = None  # (log of the source cell, its element lists at copy time)
        n = len(records)
        if n == 0:
            self.flat, self.flat_sid = [], np.zeros(0, np.int32)
            return
        # Columns of the log, one key (code, lasti, lasti above, chain) per record. Runs
        # of equal keys are common; the distinct keys of the run starts are found by one
        # sort, and only those (a few hundred, typically) get their stack built.
        codes = list(map(_record_code, records))
        columns = [np.fromiter(map(id, codes), np.int64, n)]
        columns += [np.fromiter(map(getter, records), np.int64, n) for getter in _RECORD_INTS]
        starts = np.zeros(n, bool)
        starts[0] = True
        for column in columns:
            starts[1:] |= column[1:] != column[:-1]
        start_index = np.flatnonzero(starts)
        rows = np.column_stack([column[start_index] for column in columns])
        order = np.lexsort(rows.T[::-1])
        ordered = rows[order]
        new_key = np.r_[True, (ordered[1:] != ordered[:-1]).any(axis=1)]
        run_key = np.empty(len(order), np.int64)
        run_key[order] = np.cumsum(new_key) - 1
        key_sid = np.empty(int(new_key.sum()), np.int32)
        for k, i in enumerate(start_index[order[new_key]].tolist()):
            _e, code, lasti, above_lasti, cid = records[i]
            key_sid[k] = self._stack(code, lasti, above_lasti, cid)
        record_sid = np.repeat(key_sid[run_key], np.diff(np.append(start_index, n)))
        elements = list(map(_record_elements, records))
        self.flat = list(chain.from_iterable(elements))
        if len(self.flat) == n:  # one element per add (empty adds are not logged)
            self.flat_sid = record_sid
        else:
            counts = np.fromiter(map(len, elements), np.int64, n)
            self.flat_sid = np.repeat(record_sid, counts)

    def _sid(self, record):
        _elements, code, lasti, above_lasti, cid = record
        return self._stack(code, lasti, above_lasti, cid)

    def _stack(self, code, lasti, above_lasti, cid):
        if code is None:
            return -1
        tables = self.tables
        ids = [tables.frame_id(code, lasti)]
        above_code, outer = self.recorder.chains[cid]
        if above_code is not None:
            ids.append(tables.frame_id(above_code, above_lasti))
            ids.extend(tables.frame_id(c, l) for c, l in outer)
        return tables.stack_id(ids)

    def stacks_for(self, objects, kind):
        """Stack id of each object; kind names the cell's list they come from."""
        n = len(objects)
        if n == 0:
            return np.zeros(0, np.int32)
        if objects == self.flat:  # the usual case: identity, in add order, C speed
            return self.flat_sid.copy()
        result = self._by_identity(objects)
        if self.copy_of is not None:
            # A copied cell holds copies of the source's elements, in the same order:
            # they take the stacks of the originals they were made from.
            source_log, snapshot = self.copy_of
            originals = snapshot[kind][:n]
            unmatched = np.flatnonzero(result[: len(originals)] == self.fallback)
            if len(unmatched):
                result[unmatched] = source_log.stacks_for(originals, kind)[unmatched]
        return result

    def _by_identity(self, objects):
        n = len(objects)
        if self._sorted is None:
            ids = np.fromiter(map(id, self.flat), np.int64, len(self.flat))
            order = np.argsort(ids, kind="stable")
            self._sorted = (ids[order], self.flat_sid[order])
        sorted_ids, sorted_sid = self._sorted
        wanted = np.fromiter(map(id, objects), np.int64, n)
        result = np.full(n, self.fallback, np.int32)
        if len(sorted_ids):
            # The last add of an object wins (it may have been removed and added again).
            where = np.maximum(np.searchsorted(sorted_ids, wanted, side="right") - 1, 0)
            found = sorted_ids[where] == wanted
            result[found] = sorted_sid[where[found]]
        return result


class _Logs:
    """One _CellLog per cell, built when first needed (a copy needs its source's)."""

    def __init__(self, recorder, tables):
        self.recorder = recorder
        self.tables = tables
        self._logs = {}

    def of(self, cell):
        log = self._logs.get(id(cell))
        if log is None:
            recorder = self.recorder
            log = _CellLog(recorder.log_of(cell), self.tables, recorder, recorder.fallback.get(id(cell)))
            self._logs[id(cell)] = log
            if id(cell) in recorder.copies:
                source, snapshot = recorder.copies[id(cell)]
                log.copy_of = (self.of(source), snapshot)
        return log


def _no_stacks(objects, kind=None):
    return np.full(len(objects), -1, np.int32)


def _polygon_arrays(polygons, stacks):
    """(layer, datatype, offsets, points, stack) with repetitions expanded."""
    n = len(polygons)
    if n == 0:
        return (_i32(), _i32(), np.zeros(1, np.int64), _xy(), _i32())
    pieces = list(map(_points, polygons))
    counts = np.fromiter(map(len, pieces), np.int64, n)
    layer = np.fromiter(map(_layer, polygons), np.int32, n)
    datatype = np.fromiter(map(_datatype, polygons), np.int32, n)
    copies = np.fromiter(map(_repetition_size, polygons), np.int64, n)
    points = np.concatenate(pieces).reshape(-1, 2)  # (k, 2) float64 arrays from gdstk
    offsets = np.zeros(n + 1, np.int64)
    np.cumsum(counts, out=offsets[1:])
    repeated = np.flatnonzero(copies > 0)
    if len(repeated):
        layer, datatype, offsets, points, stacks = _expand_repetitions(
            polygons, repeated, copies, layer, datatype, offsets, points, stacks)
    return layer, datatype, offsets, points, stacks


def _expand_repetitions(polygons, repeated, copies, layer, datatype, offsets, points, stacks):
    """Replace each polygon carrying a repetition by its copies, in place in the order."""
    n = len(layer)
    copies = np.maximum(copies, 1)
    moves = {}
    for k in repeated.tolist():
        moves[k] = _xy(polygons[k].repetition.get_offsets())
        copies[k] = len(moves[k])
    source = np.repeat(np.arange(n), copies)  # source polygon of each output polygon
    first_copy = np.cumsum(copies) - copies
    shift = np.zeros((len(source), 2))
    for k, move in moves.items():
        shift[first_copy[k]:first_copy[k] + len(move)] = move
    counts = np.diff(offsets)[source]
    new_offsets = np.zeros(len(source) + 1, np.int64)
    np.cumsum(counts, out=new_offsets[1:])
    # Point j of output polygon m is point offsets[source[m]] + j of the input.
    within = np.arange(new_offsets[-1]) - np.repeat(new_offsets[:-1], counts)
    point_source = np.repeat(offsets[:-1][source], counts) + within
    new_points = points[point_source] + np.repeat(shift, counts, axis=0)
    return layer[source], datatype[source], new_offsets, new_points, np.asarray(stacks)[source]


def _concat_polygons(parts):
    layers, datatypes, offsets, points, stacks = zip(*parts)
    shifted = [offsets[0]]
    base = offsets[0][-1]
    for extra in offsets[1:]:
        shifted.append(extra[1:] + base)
        base += extra[-1]
    return (np.concatenate(layers), np.concatenate(datatypes), np.concatenate(shifted),
            np.concatenate(points), np.concatenate(stacks).astype(np.int32))


def _repetition_fields(repetition):
    """(columns, rows, v1, v2, explicit offsets) of a gdstk repetition."""
    if repetition.size == 0:
        return 1, 1, (0.0, 0.0), (0.0, 0.0), None
    if repetition.columns is not None:
        if repetition.v1 is None:  # rectangular
            dx, dy = repetition.spacing
            return repetition.columns, repetition.rows, (dx, 0.0), (0.0, dy), None
        return repetition.columns, repetition.rows, repetition.v1, repetition.v2, None
    return 1, 1, (0.0, 0.0), (0.0, 0.0), _xy(repetition.get_offsets())


class _CellList:
    """Captured cells in order, found by identity; references add their targets."""

    def __init__(self):
        self.cells = []
        self._index = {}
        self._by_name = {}

    def add(self, cell):
        key = ("name", cell) if isinstance(cell, str) else id(cell)
        if key not in self._index:
            self._index[key] = len(self.cells)
            self.cells.append(cell)
            name = cell if isinstance(cell, str) else cell.name
            self._by_name.setdefault(name, self._index[key])
        return self._index[key]

    def index_of(self, target):
        if isinstance(target, str) and target in self._by_name:  # a reference by name
            return self._by_name[target]
        return self.add(target)


def collect(cells, recorder=None, unit=1e-6, source=""):
    """Header and arrays for the given cells and every cell they reference."""
    tables = _StackTables()
    logs = _Logs(recorder, tables) if recorder is not None else None
    order = _CellList()
    for cell in cells:
        order.add(cell)
    header_cells = []
    arrays = []

    def put(array):
        arrays.append(array)
        return len(arrays) - 1

    position = 0
    while position < len(order.cells):
        cell = order.cells[position]
        position += 1
        entry = {"name": cell if isinstance(cell, str) else cell.name}
        header_cells.append(entry)
        if isinstance(cell, str) or not isinstance(cell, _BaseCell):
            entry["placeholder"] = True  # a RawCell or a reference by an unknown name
            entry["fields"] = {}
            continue
        stacks_for = logs.of(cell).stacks_for if logs is not None else _no_stacks
        entry["fields"] = fields = {}
        polygons = cell.polygons
        parts = [_polygon_arrays(polygons, stacks_for(polygons, "polygons"))]
        paths = cell.paths
        for path, sid in zip(paths, stacks_for(paths, "paths")):
            converted = path.to_polygons()
            parts.append(_polygon_arrays(converted, np.full(len(converted), sid, np.int32)))
        layer, datatype, offsets, points, stacks = _concat_polygons(parts) if len(parts) > 1 else parts[0]
        fields.update(poly_layer=put(layer), poly_datatype=put(datatype), poly_offsets=put(offsets),
                      points=put(points), poly_stack=put(stacks))
        _collect_labels(cell.labels, stacks_for, entry, fields, put)
        _collect_references(cell.references, stacks_for, order, fields, put)
    header = {
        "version": WIRE_VERSION,
        "status": "ok",
        "unit": unit,
        "source": source,
        "cells": header_cells,
        "frames": tables.frames,
        "stacks": [list(s) for s in tables.stacks],
    }
    return header, arrays


def _collect_labels(labels, stacks_for, entry, fields, put):
    texts, layers, texttypes, origins, stacks = [], [], [], [], []
    for label, sid in zip(labels, stacks_for(labels, "labels")):
        shifts = [(0.0, 0.0)]
        if label.repetition.size:
            shifts = label.repetition.get_offsets()
        x, y = label.origin
        for dx, dy in shifts:
            texts.append(label.text)
            layers.append(label.layer)
            texttypes.append(label.texttype)
            origins.append((x + dx, y + dy))
            stacks.append(sid)
    entry["labels"] = texts
    fields.update(label_layer=put(_i32(layers)), label_texttype=put(_i32(texttypes)),
                  label_origin=put(_xy(origins)), label_stack=put(_i32(stacks)))


def _collect_references(references, stacks_for, order, fields, put):
    n = len(references)
    target = np.zeros(n, np.int32)
    origin = np.zeros((n, 2))
    rotation = np.zeros(n)
    magnification = np.ones(n)
    reflection = np.zeros(n, bool)
    columns = np.ones(n, np.int32)
    rows = np.ones(n, np.int32)
    v1 = np.zeros((n, 2))
    v2 = np.zeros((n, 2))
    explicit_offsets = np.zeros(n + 1, np.int64)
    explicit = []
    for k, reference in enumerate(references):
        target[k] = order.index_of(reference.cell)
        origin[k] = reference.origin
        rotation[k] = reference.rotation
        magnification[k] = reference.magnification
        reflection[k] = reference.x_reflection
        columns[k], rows[k], v1[k], v2[k], offsets = _repetition_fields(reference.repetition)
        count = 0
        if offsets is not None:
            explicit.append(offsets)
            count = len(offsets)
        explicit_offsets[k + 1] = explicit_offsets[k] + count
    fields.update(
        ref_cell=put(target), ref_origin=put(origin), ref_rotation=put(rotation),
        ref_magnification=put(magnification), ref_x_reflection=put(reflection),
        ref_columns=put(columns), ref_rows=put(rows), ref_v1=put(v1), ref_v2=put(v2),
        ref_explicit_offsets=put(explicit_offsets),
        ref_explicit=put(np.concatenate(explicit) if explicit else _xy()),
        ref_stack=put(stacks_for(references, "references").astype(np.int32)))


def captured_cells(recorder):
    """Every cell the script created or put in a library, in creation order."""
    cells = list(recorder.created)
    for library in recorder.libraries:
        cells.extend(library.cells)
    return cells


# ---------------------------------------------------------------------------
# Running the script.


TRACEBACK_KEEP = (150, 50)  # innermost and outermost frames kept of a deeper traceback


def traceback_frames(tb, tables):
    """Frame ids of a traceback, innermost first, probe frames left out.

    Every frame is kept (the checker picks the user's), except that a runaway
    recursion keeps only its innermost and outermost frames.
    """
    entries = []
    while tb is not None:
        code = tb.tb_frame.f_code
        if code.co_filename != PROBE_FILE:
            entries.append((code, tb.tb_lasti))
        tb = tb.tb_next
    entries.reverse()
    inner, outer = TRACEBACK_KEEP
    if len(entries) > inner + outer:
        entries = entries[:inner] + entries[-outer:]
    return [tables.frame_id(code, lasti) for code, lasti in entries]


def failure_header(kind, exc_type, message, frames=()):
    return {
        "version": WIRE_VERSION,
        "status": kind,
        "exc_type": exc_type,
        "message": message,
        "frames": [list(f) for f in frames],
    }


def _exception_failure(error, memory_limit):
    tables = _StackTables()
    frame_ids = traceback_frames(error.__traceback__, tables)
    frames = [tables.frames[i] for i in frame_ids]
    try:
        message = str(error)
    except Exception:
        message = "(the exception's message could not be shown)"
    if isinstance(error, SyntaxError):
        message = error.msg or message
        if error.filename and error.lineno:
            frames.insert(0, [error.filename, error.lineno, "<module>", error.offset,
                              getattr(error, "end_lineno", None), getattr(error, "end_offset", None)])
    kind = "error"
    if isinstance(error, MemoryError):
        kind = "limit"
        limit = " (address-space limit %.1f GiB)" % (memory_limit / 2**30) if memory_limit else ""
        message = "the script ran out of memory%s%s" % (limit, ": " + message if message else "")
    return failure_header(kind, type(error).__name__, message, frames)


class _Options:
    """One job: the keys of the job object, plus the pipes and limits of the child."""

    result_fd = None
    control_fd = None
    source = None  # text that runs instead of the file's content, under the file's name
    timeout = None
    memory = None
    paths = ()
    depth = STACK_DEPTH
    script = None
    call = None  # a function to import the script for and call, instead of running it
    kwargs = {}
    non_layout = "error"
    layout = None  # "gds" or "oas": read the file at ``script`` with gdstk instead of running anything


JOB_KEYS = ("script", "source", "timeout", "paths", "depth", "call", "kwargs", "non_layout", "layout")


def options_from_job(job, config):
    """Options for a job object; raises ValueError naming a malformed key."""
    if not isinstance(job, dict) or not isinstance(job.get("script"), str):
        raise ValueError("a job is a JSON object with a script path, got %r" % (job,))
    unknown = set(job) - set(JOB_KEYS)
    if unknown:
        raise ValueError("unknown job keys %s" % sorted(unknown))
    options = _Options()
    for key in JOB_KEYS:
        if job.get(key) is not None:
            setattr(options, key, job[key])
    options.script = os.path.abspath(options.script)
    options.paths = list(options.paths)
    if not isinstance(options.kwargs, dict):
        raise ValueError("job kwargs must be an object, got %r" % (options.kwargs,))
    if options.non_layout not in ("error", "ignore"):
        raise ValueError("job non_layout is error or ignore, got %r" % (options.non_layout,))
    if options.layout not in (None, "gds", "oas"):
        raise ValueError("job layout is gds or oas, got %r" % (options.layout,))
    options.result_fd = config.get("result_fd")
    options.control_fd = config.get("control_fd")
    options.memory = config.get("memory")
    return options


class _Control:
    def __init__(self, fd):
        self.fd = fd

    def say(self, text):
        if self.fd is not None:
            try:
                os.write(self.fd, text.encode("utf-8") + b"\n")
            except OSError:
                pass


def _finish_threads():
    """Wait for the script's non-daemon threads, as interpreter exit would."""
    threading = sys.modules.get("threading")
    if threading is None:
        return
    for thread in threading.enumerate():
        if thread is not threading.current_thread() and not thread.daemon:
            thread.join()


def _run_exit_handlers():
    import atexit

    run = getattr(atexit, "_run_exitfuncs", None)
    if run is not None:
        run()


def run(options):
    """Run the script; return (header, arrays) to send."""
    if _IMPORT_ERROR is not None:
        return failure_header("error", type(_IMPORT_ERROR).__name__,
                              "the interpreter %s cannot import numpy and gdstk: %s"
                              % (sys.executable, _IMPORT_ERROR)), []
    control = _Control(options.control_fd)
    if options.layout is not None:
        return read_layout_file(options, control)
    script = options.script
    try:
        if options.source is not None:  # lone surrogates from an editor buffer fail to compile, not here
            source = options.source.encode("utf-8", "surrogatepass")
        else:
            with open(script, "rb") as handle:
                source = handle.read()
    except OSError as error:
        return failure_header("error", type(error).__name__,
                              "cannot read the script %s: %s" % (script, error.strerror or error)), []
    _remember_source(script, source)
    for path in reversed(options.paths):
        if path not in sys.path:
            sys.path.insert(0, path)
    recorder = _Recorder(options.depth)
    install(recorder)
    import types

    # A call imports the script as a module named after its file, as `import` would,
    # so its `if __name__ == "__main__":` part stays out; a plain run is __main__.
    name = "__main__" if options.call is None else os.path.splitext(os.path.basename(script))[0]
    module = types.ModuleType(name)
    module.__file__ = script
    sys.modules[name] = module
    sys.argv = [script]
    failure = None
    returned = None
    if options.control_fd is not None:  # a crash (C-stack overflow, say) still names the line
        faulthandler.enable(file=options.control_fd, all_threads=False)
    if options.timeout is not None and options.timeout > 0:
        faulthandler.dump_traceback_later(options.timeout, exit=True,
                                          file=options.control_fd if options.control_fd is not None else sys.stderr)
    try:
        code = compile(source, script, "exec", dont_inherit=True)
        exec(code, module.__dict__)
        if options.call is not None:
            returned, failure = _call_generator(module, options)
        _finish_threads()
    except SystemExit as stop:
        if stop.code not in (None, 0):
            failure = _exception_failure(stop, options.memory)
            if isinstance(stop.code, int):
                failure["message"] = "the script exited with status %d" % stop.code
            else:  # like the interpreter: a non-integer exit code is printed
                failure["message"] = str(stop.code)
                print(stop.code, file=sys.stderr)
    except BaseException as error:
        failure = _exception_failure(error, options.memory)
    try:
        _run_exit_handlers()
    except BaseException:
        pass
    faulthandler.cancel_dump_traceback_later()
    control.say("finished")
    if failure is not None:
        return failure, []
    try:
        unit = recorder.libraries[0].unit if recorder.libraries else 1e-6
        if returned is not None:  # a call: the returned cells are the tops, other cells are left out
            cells, unit = returned
            return collect(cells, recorder, unit=unit or 1e-6, source=script)
        return collect(captured_cells(recorder), recorder, unit=unit, source=script)
    except MemoryError as error:
        return _exception_failure(error, options.memory), []
    except Exception as error:
        return failure_header("error", type(error).__name__,
                              "latchwatch could not read the script's layout: %s" % (error,)), []


def read_layout_file(options, control):
    """A GDSII or OASIS file read here, not in the tool: gdstk may crash on a corrupt one."""
    kind = "GDSII" if options.layout == "gds" else "OASIS"
    try:
        reader = gdstk.read_gds if options.layout == "gds" else gdstk.read_oas
        library = reader(options.script)
    except (OSError, RuntimeError, ValueError) as error:
        return failure_header("error", None, "cannot read %s as %s: %s"
                              % (os.path.basename(options.script), kind, error)), []
    except MemoryError as error:
        return _exception_failure(error, options.memory), []
    control.say("finished")  # reading is done; collecting gets the collection allowance
    try:
        header, arrays = collect(library.cells, recorder=None, unit=library.unit, source=options.script)
    except MemoryError as error:
        return _exception_failure(error, options.memory), []
    header["precision"] = library.precision
    return header, arrays


NOT_A_LAYOUT = "returned %s, not a gdstk.Cell, a gdstk.Library or a list of them"


def _call_generator(module, options):
    """Call ``options.call`` of the imported script with ``options.kwargs``.

    Returns ((cells, unit), None), or (None, failure header). The returned cells (a
    Cell, a Library's cells, or the cells and libraries of a list) are what gets
    collected, with the cells they reference; cells created but not returned are not.
    With ``--non-layout ignore`` a value that is no layout collects nothing instead of
    failing (used to try every function of a file that builds nothing itself).
    """
    function = module.__dict__.get(options.call)
    if not callable(function):
        return None, failure_header("error", "AttributeError", "the script %s defines no function named %r"
                                    % (os.path.basename(options.script), options.call))
    value = function(**options.kwargs)
    cells, unit = [], None
    for item in value if isinstance(value, (list, tuple)) else [value]:
        if isinstance(item, _BaseCell):
            cells.append(item)
        elif isinstance(item, _BaseLibrary):
            cells.extend(item.cells)
            unit = unit or item.unit
        else:
            cells = None
            break
    if cells is not None:
        return (cells, unit), None
    if options.non_layout == "ignore":
        return ([], None), None
    code = getattr(function, "__code__", None)
    frames = [[code.co_filename, code.co_firstlineno, code.co_name, None, None, None]] if code else []
    arguments = ", ".join("%s=%r" % item for item in options.kwargs.items())
    return None, failure_header("error", "TypeError", "%s(%s) %s" % (
        options.call, arguments, NOT_A_LAYOUT % type(value).__name__), frames)


def _remember_source(path, source):
    """Let linecache (tracebacks, column conversion) see the text that really ran."""
    import linecache

    try:
        text = source.decode("utf-8")
    except UnicodeDecodeError:
        return
    lines = text.splitlines(True)
    linecache.cache[path] = (len(text), None, lines, path)


def _read_job(fd):
    """The job object the runner writes to the job pipe, or None at end of input."""
    chunks = []
    while True:
        chunk = os.read(fd, 1 << 20)
        if not chunk:
            break
        chunks.append(chunk)
    os.close(fd)
    return json.loads(b"".join(chunks).decode("utf-8")) if chunks else None


def serve(config):
    """Wait for one job, run it, send the result, exit. Never returns."""
    control = _Control(config.get("control_fd"))
    try:  # prints reach the log line by line, and survive a kill on timeout
        sys.stdout.reconfigure(line_buffering=True)
    except (AttributeError, ValueError):
        pass
    if _IMPORT_ERROR is None:
        control.say("ready numpy=%s gdstk=%s" % (np.__version__, getattr(gdstk, "__version__", "?")))
    else:
        control.say("ready import-error=%s" % json.dumps(str(_IMPORT_ERROR)))
    try:
        job = _read_job(config["job_fd"])
        if job is None:  # a spare nobody needed: the runner closed the pipe, or went away
            os._exit(0)
        options = options_from_job(job, config)
    except (OSError, ValueError) as error:
        control.say("bad job: %s" % error)
        os._exit(2)
    control.say("started")
    header, arrays = run(options)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except Exception:
            pass
    if options.result_fd is not None:
        try:
            write_payload(options.result_fd, header, arrays)
        except MemoryError:
            write_payload(options.result_fd, failure_header(
                "limit", "MemoryError", "the captured layout did not fit in the memory limit"), [])
        except OSError:
            pass  # the script closed or broke the result pipe: the parent sees no result
    # Skip tearing down the script's objects: the result is out, and freeing hundreds
    # of thousands of shapes one by one only costs time.
    os._exit(0)


if __name__ == "__main__":
    raise SystemExit("probe.py is loaded by sandbox_child.py, which confines the child first")
