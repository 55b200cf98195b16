"""Collection for gdstk: cells (and the cells they reference) into a header and numpy arrays.

Importable in the parent too (tests read files through it); importing patches nothing.
"""

from __future__ import annotations

from itertools import chain
from operator import attrgetter, itemgetter

import numpy as np

from .capture_gdstk import BaseCell
from .stacks import StackTables
from .wire_format import layout_header

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
        # Column by column throughout: stacking them into rows and comparing along the rows
        # cost more than the sort itself (0.29 s of a 1M-record log).
        columns = [np.fromiter(map(id, map(_record_code, records)), np.int64, n)]
        columns += [np.fromiter(map(getter, records), np.int64, n) for getter in _RECORD_INTS]
        starts = np.zeros(n, bool)
        starts[0] = True
        for column in columns:
            starts[1:] |= column[1:] != column[:-1]
        start_index = np.flatnonzero(starts)
        keys = [column[start_index] for column in columns]
        order = np.lexsort(keys[::-1])  # by code, then offset, offset above, chain
        same = np.ones(len(order) - 1, bool)  # each sorted key equal to the one before it
        for key in keys:
            ordered = key[order]
            same &= ordered[1:] == ordered[:-1]
        new_key = np.r_[True, ~same]
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
        return self.recorder.stack_of(self.tables, code, lasti, above_lasti, cid)

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


def collect(cells, recorder=None, unit=1e-6, source="", tables=None, positions=None):
    """Header and arrays for the given cells and every cell they reference.

    ``tables`` interns the stacks; pass the run's own to add another backend's cells after these.
    ``positions``, a dict, receives each collected cell's index in the header (by ``id(cell)``).
    """
    tables = StackTables() if tables is None else tables
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
        if isinstance(cell, str) or not isinstance(cell, BaseCell):
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
    if positions is not None:
        positions.update((key, index) for key, index in order._index.items() if not isinstance(key, tuple))
    return layout_header(unit, source, header_cells, tables), arrays


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
