"""Collection for KLayout: the cells of the layouts a script filled, as the arrays of child/wire_format.py.

Coordinates go out in the header's user unit (micrometres unless gdstk cells set
another), converted from each layout's database unit. Polygons with holes are sent with
their holes joined to the hull by cut lines (KLayout's ``resolved_holes``), the form
the gdstk collector sends too; paths go out as their outline polygons, texts as labels.
Edges, edge pairs and points have no area and are left out. klayout is never imported
here: its module is passed in, as the script loaded it.
"""

from __future__ import annotations

import math

import numpy as np


class _RecordStacks:
    """Stack ids of log records, resolved once per distinct position."""

    def __init__(self, recorder, tables):
        self.recorder = recorder
        self.tables = tables
        self._cache = {}

    def of(self, record):
        _subject, code, lasti, above_lasti, cid = record
        key = (id(code), lasti, above_lasti, cid)
        sid = self._cache.get(key)
        if sid is None:
            sid = self._cache[key] = self.recorder.stack_of(self.tables, code, lasti, above_lasti, cid)
        return sid


def _shape_stacks(records, kind, stacks, layouts):
    """{Shape: stack id} of the records whose shape still exists; the last insert wins.

    Adds the layouts of those shapes to ``layouts`` ({id: layout}): a layout KLayout made
    itself (a kdb.Library's, as kfactory uses) was never constructed by the script.
    """
    found = {}
    for record in records:
        shape = record[0]
        if type(shape) is kind and shape.is_valid():
            found[shape] = stacks.of(record)
            layout = shape.layout()
            if layout is not None:
                layouts.setdefault(_layout_key(layout), layout)
    return found


class _InstanceStacks:
    """Stack ids of logged instances, found by parent cell and placement (a CellInstArray); the last insert wins."""

    def __init__(self, records, stacks):
        self._buckets = {}
        for record in records:
            subject = record[0]
            layout, parent, placement = subject[:3]
            if len(subject) == 4:  # a placement changed in place: it keeps the stack of its insert
                sid = self._find(_layout_key(layout), parent, subject[3])
                if sid < 0:
                    continue
            else:
                sid = stacks.of(record)
            self._buckets.setdefault((_layout_key(layout), parent, placement.hash()), []).append((placement, sid))

    def _find(self, layout_key, parent, placement):
        for candidate, sid in reversed(self._buckets.get((layout_key, parent, placement.hash()), ())):
            if candidate == placement:
                return sid
        return -1

    def get(self, layout, instance, default=-1):
        """The stack id of the last insert of an instance like this one into its parent cell, or ``default``."""
        sid = self._find(_layout_key(layout), instance.parent_cell.cell_index(), instance.cell_inst)
        return default if sid < 0 else sid


def _layout_key(layout):
    return id(layout)


class _Capture:
    """What the logs say about one run: the layouts made, and the stack of each logged object."""

    def __init__(self, recorder, tables, kdb):
        stacks = _RecordStacks(recorder, tables)
        # Layouts in order of construction, then of first use; KLayout hands out one
        # Python object per layout, so identity tells them apart.
        layouts = {_layout_key(layout): layout for layout in recorder.layouts}
        self.shape_stacks = _shape_stacks(recorder.shapes, kdb.Shape, stacks, layouts)
        self.instance_stacks = _InstanceStacks(recorder.instances, stacks)
        for record in recorder.instances + recorder.bulk:
            layouts.setdefault(_layout_key(record[0][0]), record[0][0])
        self.layouts = [layout for layout in layouts.values() if layout.cells()]
        # A cell filled by a bulk call (flatten, a copy, a container inserted whole)
        # gives its unlogged shapes the stack of the last such call.
        self.cell_fallback = {}
        for record in recorder.bulk:
            layout, cell_index = record[0]
            self.cell_fallback[(_layout_key(layout), cell_index)] = stacks.of(record)


def add_layouts(header, arrays, tables, recorder, kdb, tops=None, layouts=None, positions=None):
    """Append KLayout cells to a layout header and its arrays (in place); returns both.

    By default every cell of every layout the script made that has cells; with ``tops`` (the
    cells a generator returned) those and the cells they call; with ``layouts`` (a
    file read) every cell of those. ``positions``, a dict, receives each cell's index in
    the header by (``id(layout)``, cell index).
    """
    capture = _Capture(recorder, tables, kdb)
    if tops is not None:
        chosen = _cells_under(tops)
    else:
        chosen = [(layout, list(layout.each_cell())) for layout in (capture.layouts if layouts is None else layouts)]
    entries = header["cells"]
    index = {}
    for layout, cells in chosen:
        for cell in cells:
            index[(_layout_key(layout), cell.cell_index())] = len(entries) + len(index)
    had_cells = bool(entries)
    if positions is not None:
        positions.update(index)

    def put(array):
        arrays.append(array)
        return len(arrays) - 1

    for layout, cells in chosen:
        scale = layout.dbu * 1e-6 / header["unit"]  # database units to the header's unit
        layers = [(li, layout.get_info(li)) for li in layout.layer_indexes()]
        for cell in cells:
            entries.append(_cell_entry(cell, layout, layers, scale, capture, index, put))
    if chosen and not had_cells:
        header["precision"] = min(layout.dbu for layout, _cells in chosen) * 1e-6
    header["stacks"] = [list(s) for s in tables.stacks]
    return header, arrays


def _cells_under(tops):
    """[(layout, cells)]: each top and the cells it calls, grouped by layout, tops first."""
    grouped = {}
    for top in tops:
        layout = top.layout()
        cells = grouped.setdefault(_layout_key(layout), (layout, [], set()))
        for cell_index in [top.cell_index()] + sorted(top.called_cells()):
            if cell_index not in cells[2]:
                cells[2].add(cell_index)
                cells[1].append(layout.cell(cell_index))
    return [(layout, cells) for layout, cells, _seen in grouped.values()]


def _cell_entry(cell, layout, layers, scale, capture, index, put):
    fallback = capture.cell_fallback.get((_layout_key(layout), cell.cell_index()), -1)
    shape_stacks = capture.shape_stacks
    poly_layer, poly_datatype, counts, coordinates, poly_stack = [], [], [], [], []
    texts, label_layer, label_texttype, label_xy, label_stack = [], [], [], [], []
    for layer_index, info in layers:
        shapes = cell.shapes(layer_index)
        if shapes.is_empty():
            continue
        for shape in shapes.each():
            sid = shape_stacks.get(shape, fallback)
            if shape.is_box():
                box = shape.box
                left, bottom, right, top = box.left, box.bottom, box.right, box.top
                coordinates.extend((left, bottom, right, bottom, right, top, left, top))
                count = 4
            elif shape.is_text():
                position = shape.text_pos
                texts.append(shape.text_string)
                label_layer.append(info.layer)
                label_texttype.append(info.datatype)
                label_xy.extend((position.x, position.y))
                label_stack.append(sid)
                continue
            else:
                polygon = shape.polygon  # polygons, simple polygons and paths; None for edges and points
                if polygon is None:
                    continue
                if polygon.holes():
                    polygon = polygon.resolved_holes()
                before = len(coordinates)
                for point in polygon.each_point_hull():
                    coordinates.append(point.x)
                    coordinates.append(point.y)
                count = (len(coordinates) - before) // 2
            poly_layer.append(info.layer)
            poly_datatype.append(info.datatype)
            counts.append(count)
            poly_stack.append(sid)
    offsets = np.zeros(len(counts) + 1, np.int64)
    np.cumsum(counts, out=offsets[1:])
    fields = dict(
        poly_layer=put(_i32(poly_layer)), poly_datatype=put(_i32(poly_datatype)), poly_offsets=put(offsets),
        points=put(_xy(coordinates, scale)), poly_stack=put(_i32(poly_stack)),
        label_layer=put(_i32(label_layer)), label_texttype=put(_i32(label_texttype)),
        label_origin=put(_xy(label_xy, scale)), label_stack=put(_i32(label_stack)))
    fields.update(_instance_fields(cell, layout, scale, capture, index, put))
    return {"name": cell.name, "fields": fields, "labels": texts}


def _instance_fields(cell, layout, scale, capture, index, put):
    """The ref_* fields of a cell's instances: placement, array vectors and counts, stacks."""
    layout_key = _layout_key(layout)
    target, origin, rotation, magnification, mirror = [], [], [], [], []
    columns, rows, v1, v2, stack = [], [], [], [], []
    explicit_offsets, explicit = [0], []
    instance_stacks = capture.instance_stacks
    for instance in cell.each_inst():
        target.append(index[(layout_key, instance.cell_index)])
        placement = instance.cplx_trans  # in database units, as the array vectors
        origin.append((placement.disp.x, placement.disp.y))
        rotation.append(math.radians(placement.angle))
        magnification.append(placement.mag)
        mirror.append(placement.is_mirror())
        stack.append(instance_stacks.get(layout, instance, -1))
        count = 0
        if instance.is_regular_array():
            a, b = instance.a, instance.b
            columns.append(max(instance.na, 1))
            rows.append(max(instance.nb, 1))
            v1.append((a.x, a.y))
            v2.append((b.x, b.y))
        else:
            columns.append(1)
            rows.append(1)
            v1.append((0, 0))
            v2.append((0, 0))
            if instance.size() > 1:  # an irregular array (read from OASIS): every copy's offset
                for each in instance.cell_inst.each_cplx_trans():
                    explicit.append((each.disp.x - placement.disp.x, each.disp.y - placement.disp.y))
                    count += 1
        explicit_offsets.append(explicit_offsets[-1] + count)
    return dict(
        ref_cell=put(_i32(target)), ref_origin=put(_xy(origin, scale)), ref_rotation=put(np.asarray(rotation, np.float64)),
        ref_magnification=put(np.asarray(magnification, np.float64)), ref_x_reflection=put(np.asarray(mirror, bool)),
        ref_columns=put(_i32(columns)), ref_rows=put(_i32(rows)), ref_v1=put(_xy(v1, scale)), ref_v2=put(_xy(v2, scale)),
        ref_explicit_offsets=put(np.asarray(explicit_offsets, np.int64)), ref_explicit=put(_xy(explicit, scale)),
        ref_stack=put(_i32(stack)))


def _i32(values):
    return np.asarray(values, dtype=np.int32).reshape(-1)


def _xy(values, scale):
    """Database-unit coordinates (flat or pairs) as (n, 2) float64 in the header's unit."""
    return np.asarray(values, dtype=np.float64).reshape(-1, 2) * scale
