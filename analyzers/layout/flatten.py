"""Flatten a captured hierarchy into per-shape arrays, with numpy transforms.

Each reference copy becomes an *instance*: an affine transform (2x2 matrix plus
translation) and a parent pointer, so a finding can name the placements from the
top cell down. Transforms follow the GDSII order: x-reflection, magnification,
rotation, then translation; repetition offsets are added to the origin in the
parent's coordinates. Arrays are expanded with numpy, never one copy at a time.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import shapely

from latchwatch.analyzers.layout.budget import LayoutBudget, check_budget
from latchwatch.analyzers.layout.polygons import LazyPolygons, rectangle_rings
from latchwatch.analyzers.model.captured import CapturedLayout
from latchwatch.analyzers.model.errors import HierarchyError

MAX_DEPTH = 64


@dataclass
class Instances:
    """One row per placed copy of a cell; row 0.. are the top cell itself."""

    cell: np.ndarray  # int32, the placed cell
    parent: np.ndarray  # int32, parent instance or -1
    ref: np.ndarray  # int32, index of the reference in the parent's cell, or -1
    column: np.ndarray  # int32, repetition column (or explicit index)
    row: np.ndarray  # int32, repetition row (-1 for explicit offsets)
    matrix: np.ndarray  # (n, 2, 2)
    offset: np.ndarray  # (n, 2)

    def __len__(self) -> int:
        return len(self.cell)


@dataclass
class FlatLayout:
    """One top cell's shapes and labels in top-cell coordinates, with the instances and stacks they came through."""
    captured: CapturedLayout
    top: int
    instances: Instances
    shapes: LazyPolygons  # the polygons in top-cell coordinates, built on first use (layout/polygons.py)
    rectangles: np.ndarray  # bool per shape: its ring is an axis-aligned rectangle
    layer: np.ndarray  # int32
    datatype: np.ndarray  # int32
    stack: np.ndarray  # int32, stack id of the source polygon
    instance: np.ndarray  # int32, instance holding the shape
    source_polygon: np.ndarray  # int64, index of the polygon within its cell
    label_text: np.ndarray  # object array of str
    label_layer: np.ndarray
    label_texttype: np.ndarray
    label_xy: np.ndarray  # (k, 2)
    label_stack: np.ndarray
    label_instance: np.ndarray
    invalid: np.ndarray  # flat indices of polygons that were broken and got repaired
    invalid_reason: np.ndarray  # GEOS's reason for each of them
    invalid_area: np.ndarray  # (k, 2): area as drawn (signed rings summed) and after the repair
    # Shapes computed from these once per layout, such as derived layers (extraction/layers.py).
    cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def polygons(self) -> np.ndarray:
        """Every shape's shapely polygon (all of them built: ask ``polygons_at`` for some)."""
        return self.shapes.every()

    def polygons_at(self, idx: np.ndarray) -> np.ndarray:
        """The shapely polygons of shapes ``idx``."""
        return self.shapes.at(idx)

    @property
    def shape_count(self) -> int:
        return len(self.layer)

    def extent(self) -> np.ndarray:
        """(xmin, ymin, xmax, ymax) of every non-empty shape (nan without one)."""
        return self.shapes.extent(self.rectangles)

    @property
    def top_name(self) -> str:
        return self.captured.cells[self.top].name

    def on_layer(self, spec: tuple[int, int] | None) -> np.ndarray:
        """Indices of the shapes on one (layer, datatype) pair."""
        if spec is None:
            return np.zeros(0, dtype=np.int64)
        return np.flatnonzero((self.layer == spec[0]) & (self.datatype == spec[1]))

def _reference_matrices(rotation, magnification, x_reflection):
    cos, sin = np.cos(rotation) * magnification, np.sin(rotation) * magnification
    flip = np.where(x_reflection, -1.0, 1.0)
    # R(theta) * mag * diag(1, flip)
    return np.stack(
        [np.stack([cos, -sin * flip], axis=-1), np.stack([sin, cos * flip], axis=-1)], axis=-2
    )


def _reference_copies(cell):
    """Every copy of every reference of ``cell``: (ref index, column, row, offset)."""
    n_refs = cell.reference_count
    explicit_counts = np.diff(cell.ref_explicit_offsets)
    has_explicit = explicit_counts > 0
    lattice_counts = np.maximum(cell.ref_columns, 1) * np.maximum(cell.ref_rows, 1)
    counts = np.where(has_explicit, explicit_counts, lattice_counts).astype(np.int64)
    ref = np.repeat(np.arange(n_refs), counts)
    local = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    cols = np.maximum(cell.ref_columns, 1)[ref]
    column, row = local % cols, local // cols
    lattice = column[:, None] * cell.ref_v1[ref] + row[:, None] * cell.ref_v2[ref]
    explicit_idx = np.minimum(
        cell.ref_explicit_offsets[ref] + local, max(len(cell.ref_explicit) - 1, 0)
    )
    explicit = cell.ref_explicit[explicit_idx] if len(cell.ref_explicit) else lattice
    copy_explicit = has_explicit[ref]
    offset = np.where(copy_explicit[:, None], explicit, lattice) + cell.ref_origin[ref]
    column = np.where(copy_explicit, local, column)
    row = np.where(copy_explicit, -1, row)
    return ref, column.astype(np.int32), row.astype(np.int32), offset


def expand_instances(captured: CapturedLayout, top: int) -> Instances:
    """All placed copies of every cell under ``top``, level by level."""
    cells = [np.array([top], dtype=np.int32)]
    parents = [np.array([-1], dtype=np.int32)]
    refs, columns, rows = [np.array([-1], np.int32)], [np.array([0], np.int32)], [np.array([0], np.int32)]
    matrices, offsets = [np.eye(2)[None]], [np.zeros((1, 2))]
    level_start, total = 0, 1
    for _ in range(MAX_DEPTH):
        level_cells = np.concatenate(cells)[level_start:]
        level_mat = np.concatenate(matrices)[level_start:]
        level_off = np.concatenate(offsets)[level_start:]
        new_rows = 0
        for cell_index in np.unique(level_cells):
            cell = captured.cells[cell_index]
            if cell.reference_count == 0:
                continue
            parent_rows = np.flatnonzero(level_cells == cell_index)
            ref, col, row, copy_offset = _reference_copies(cell)
            copy_matrix = _reference_matrices(
                cell.ref_rotation[ref], cell.ref_magnification[ref], cell.ref_x_reflection[ref]
            )
            pm, po = level_mat[parent_rows], level_off[parent_rows]
            # (parents, copies, 2, 2) and (parents, copies, 2)
            mat = np.einsum("pij,cjk->pcik", pm, copy_matrix).reshape(-1, 2, 2)
            off = (np.einsum("pij,cj->pci", pm, copy_offset) + po[:, None, :]).reshape(-1, 2)
            n_par, n_copy = len(parent_rows), len(ref)
            cells.append(np.tile(cell.ref_cell[ref], n_par).astype(np.int32))
            parents.append(np.repeat(parent_rows + level_start, n_copy).astype(np.int32))
            refs.append(np.tile(ref, n_par).astype(np.int32))
            columns.append(np.tile(col, n_par))
            rows.append(np.tile(row, n_par))
            matrices.append(mat)
            offsets.append(off)
            new_rows += n_par * n_copy
        if new_rows == 0:
            break
        level_start, total = total, total + new_rows
    else:
        raise HierarchyError(
            f"cell {captured.cells[top].name!r}: references nest deeper than {MAX_DEPTH} levels (a cycle?)"
        )
    return Instances(
        cell=np.concatenate(cells), parent=np.concatenate(parents), ref=np.concatenate(refs),
        column=np.concatenate(columns), row=np.concatenate(rows),
        matrix=np.concatenate(matrices), offset=np.concatenate(offsets),
    )


def _transform_points(points, matrix, offset, grid):
    """points (m, 2) under each of k transforms -> (k, m, 2), snapped to the database grid.

    Snapping is what a layout database does on placement, and it keeps exactly abutting
    copies exactly abutting (cos 270 degrees is -1.8e-16 in floating point)."""
    moved = np.einsum("kij,mj->kmi", matrix, points) + offset[:, None, :]
    return np.round(moved / grid) * grid if grid > 0 else moved


def repair(polygons: np.ndarray, non_finite: np.ndarray | None = None):
    """Make invalid polygons valid, keeping only their polygonal parts; returns
    (broken indices, GEOS's reason for each, their (drawn, repaired) areas, the polygons).

    GDSII has no holes, so a ring is drawn as one "keyhole" outline that meets itself
    along a zero-width cut. GEOS calls that invalid, but its repair is the intended
    polygon with a hole and encloses exactly the outline's area. Every repair that
    keeps the area (keyholes, shapes touching at a corner, repeated vertices) is such
    a change of representation and is not counted as broken. A bow tie or a
    doubly-wound outline changes area under repair; a degenerate polygon (zero area)
    becomes an empty geometry that no query hits, and so does one marked in
    ``non_finite`` (NaN or infinite coordinates), which GEOS cannot repair. Rectangles are
    valid by construction and GEOS validity is costly: flatten passes only the others."""
    non_finite = np.zeros(len(polygons), dtype=bool) if non_finite is None else non_finite
    flawed = non_finite.copy()
    finite = polygons[~non_finite]
    flawed[~non_finite] = ~shapely.is_valid(finite) | (shapely.area(finite) <= 0)
    invalid = np.flatnonzero(flawed)
    if len(invalid) == 0:
        return invalid, np.empty(0, dtype=object), np.zeros((0, 2)), polygons
    unusable = non_finite[flawed]
    bad = polygons[invalid].copy()
    bad[unusable] = shapely.Polygon()
    reasons = np.array(shapely.is_valid_reason(bad), dtype=object)
    reasons[reasons == "Valid Geometry"] = "zero area"
    reasons[unusable] = "NaN or infinite coordinates"
    fixed = shapely.make_valid(bad)
    parts, owner = shapely.get_parts(fixed, return_index=True)
    keep = shapely.get_type_id(parts) == shapely.GeometryType.POLYGON
    rebuilt = np.array([shapely.Polygon()] * len(bad), dtype=object)
    if keep.any():
        present, dense = np.unique(owner[keep], return_inverse=True)
        rebuilt[present] = shapely.multipolygons(parts[keep], indices=dense)
        # One part stays a Polygon, and the cut's leftover vertices (collinear now) go.
        single = present[shapely.get_num_geometries(rebuilt[present]) == 1]
        rebuilt[single] = shapely.get_geometry(rebuilt[single], 0)
        rebuilt[present] = shapely.simplify(rebuilt[present], 0.0)
    out = polygons.copy()
    out[invalid] = rebuilt
    areas = np.column_stack([shapely.area(bad), shapely.area(rebuilt)])
    same_area = (areas[:, 0] > 0) & np.isclose(areas[:, 0], areas[:, 1], rtol=1e-9, atol=0.0)
    really_broken = unusable | ~same_area
    return invalid[really_broken], reasons[really_broken], areas[really_broken], out


DEFAULT_BUDGET = LayoutBudget()


def flatten(captured: CapturedLayout, top: int, budget: LayoutBudget = DEFAULT_BUDGET) -> FlatLayout:
    """Expand the hierarchy under ``top`` into per-shape arrays with numpy transforms, repairing invalid polygons.

    Raises LayoutTooLarge, before allocating anything, when it would expand beyond ``budget``."""
    check_budget(captured, top, budget, MAX_DEPTH)
    inst = expand_instances(captured, top)
    grid = captured.precision / captured.unit
    order = np.argsort(inst.cell, kind="stable")
    groups = np.split(order, np.flatnonzero(np.diff(inst.cell[order])) + 1) if len(order) else []
    coords, counts, layers, dts, stacks, owners, sources = [], [], [], [], [], [], []
    lt, ll, ltt, lxy, lst, lin = [], [], [], [], [], []
    for members in groups:
        cell = captured.cells[inst.cell[members[0]]]
        k = len(members)
        if cell.polygon_count:
            coords.append(_transform_points(cell.points, inst.matrix[members], inst.offset[members], grid).reshape(-1, 2))
            counts.append(np.tile(np.diff(cell.poly_offsets), k))
            layers.append(np.tile(cell.poly_layer, k))
            dts.append(np.tile(cell.poly_datatype, k))
            stacks.append(np.tile(cell.poly_stack, k))
            owners.append(np.repeat(members, cell.polygon_count))
            sources.append(np.tile(np.arange(cell.polygon_count), k))
        if len(cell.label_text):
            n = len(cell.label_text)
            lt.append(np.tile(np.array(cell.label_text, dtype=object), k))
            ll.append(np.tile(cell.label_layer, k))
            ltt.append(np.tile(cell.label_texttype, k))
            lxy.append(_transform_points(cell.label_origin, inst.matrix[members], inst.offset[members], grid).reshape(-1, 2))
            lst.append(np.tile(cell.label_stack, k))
            lin.append(np.repeat(members, n))

    def cat(parts, dtype, shape=(0,)):
        return np.concatenate(parts) if parts else np.zeros(shape, dtype=dtype)

    vertices = cat(coords, float, (0, 2))
    offsets = np.zeros(sum(len(c) for c in counts) + 1, np.int64)
    np.cumsum(cat(counts, np.int64), out=offsets[1:])
    shapes = LazyPolygons(vertices, offsets)
    non_finite = shapes.non_finite
    rectangles = rectangle_rings(vertices, offsets) & ~non_finite
    # Only shapes that are no rectangle are built now, to be tested and repaired.
    tested = np.flatnonzero(~rectangles)
    invalid, reasons, areas, repaired = repair(shapes.at(tested), non_finite[tested])
    shapes.replace(tested, repaired)
    return FlatLayout(
        captured=captured, top=top, instances=inst, invalid=tested[invalid], invalid_reason=reasons,
        invalid_area=areas, shapes=shapes, rectangles=rectangles, layer=cat(layers, np.int32), datatype=cat(dts, np.int32),
        stack=cat(stacks, np.int32), instance=cat(owners, np.int32), source_polygon=cat(sources, np.int64),
        label_text=cat(lt, object), label_layer=cat(ll, np.int32), label_texttype=cat(ltt, np.int32),
        label_xy=cat(lxy, float, (0, 2)), label_stack=cat(lst, np.int32), label_instance=cat(lin, np.int32),
    )
