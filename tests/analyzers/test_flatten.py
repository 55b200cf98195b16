"""Flattening against gdstk's own hierarchy expansion (the reference implementation)."""

import gdstk
import numpy as np
import pytest
import shapely

from latchwatch.analyzers.layout.flatten import HierarchyError, flatten

from builders import ACTIVE, NWELL, CellBuilder, layout

CASES = [
    dict(origin=(10, 5)),
    dict(origin=(3, -2), rotation=np.pi / 2),
    dict(origin=(0, 0), rotation=0.3, magnification=2.5),
    dict(origin=(7, 1), x_reflection=True, rotation=np.pi),
    dict(origin=(1, 1), columns=3, rows=2, v1=(5, 0), v2=(0, 7)),
    dict(origin=(1, 1), columns=2, rows=2, v1=(4, 1), v2=(-1, 6), rotation=0.7, x_reflection=True),
    dict(origin=(2, 3), explicit=[(0, 0), (10, 0), (3, 9)], magnification=0.5),
]


def _gdstk_reference(case):
    unit = gdstk.Cell("UNIT")
    unit.add(gdstk.Polygon([(0, 0), (2, 0), (2, 1), (1, 3), (0, 1)], layer=2))
    kw = dict(rotation=case.get("rotation", 0), magnification=case.get("magnification", 1),
              x_reflection=case.get("x_reflection", False))
    if "explicit" in case:
        ref = gdstk.Reference(unit, case["origin"], **kw)
        ref.repetition = gdstk.Repetition(offsets=case["explicit"])
    elif case.get("columns", 1) * case.get("rows", 1) > 1:
        ref = gdstk.Reference(unit, case["origin"], **kw)
        ref.repetition = gdstk.Repetition(case["columns"], case["rows"], v1=case["v1"], v2=case["v2"])
    else:
        ref = gdstk.Reference(unit, case["origin"], **kw)
    top = gdstk.Cell("TOP")
    top.add(ref)
    return shapely.union_all([shapely.Polygon(p.points) for p in top.get_polygons()])


@pytest.mark.parametrize("case", CASES)
def test_transforms_match_gdstk(case):
    unit = CellBuilder("UNIT").polygon(ACTIVE, [(0, 0), (2, 0), (2, 1), (1, 3), (0, 1)])
    top = CellBuilder("TOP").ref(0, **case)
    flat = flatten(layout(unit, top), top=1)
    ours = shapely.union_all(flat.polygons)
    expected = _gdstk_reference(case)
    # Equal up to the snap to the 1 nm database grid (at most half a grid diagonal).
    assert shapely.hausdorff_distance(ours, expected) <= 0.5e-3 * np.sqrt(2) + 1e-12
    copies = len(case.get("explicit") or []) or case.get("columns", 1) * case.get("rows", 1)
    assert len(flat.polygons) == copies


def test_nested_arrays_expand_without_loops_over_instances():
    leaf = CellBuilder("LEAF").rect(ACTIVE, 0, 0, 1, 1)
    mid = CellBuilder("MID").ref(0, columns=10, rows=1, v1=(2, 0), v2=(0, 0))
    top = CellBuilder("TOP").ref(1, columns=1, rows=20, v1=(0, 0), v2=(0, 3), origin=(5, 5))
    flat = flatten(layout(leaf, mid, top), top=2)
    assert len(flat.polygons) == 200
    xs, ys = shapely.get_coordinates(shapely.centroid(flat.polygons)).T
    assert sorted(set(np.round(xs, 6))) == [5.5 + 2 * i for i in range(10)]
    assert sorted(set(np.round(ys, 6))) == [5.5 + 3 * j for j in range(20)]
    # Instance names come from the repetition index of each level.
    inst = flat.instances
    assert inst.column.max() == 9 and inst.row.max() == 19


def test_cycle_is_reported():
    a = CellBuilder("A").ref(1)
    b = CellBuilder("B").ref(0).rect(ACTIVE, 0, 0, 1, 1)
    with pytest.raises(HierarchyError, match="deeper"):
        flatten(layout(a, b), top=0)


def test_invalid_polygon_is_repaired_and_recorded():
    c = CellBuilder("TOP").polygon(ACTIVE, [(0, 0), (2, 2), (2, 0), (0, 2)]).rect(ACTIVE, 5, 5, 5, 6)
    flat = flatten(layout(c), top=0)
    assert flat.invalid.tolist() == [0, 1]
    assert "Self-intersection" in flat.invalid_reason[0]
    assert flat.invalid_reason[1]  # GEOS names what is wrong with a zero-width box
    assert shapely.is_valid(flat.polygons).all()
    assert flat.polygons[0].area == pytest.approx(2.0)  # two triangles of the bow tie


def test_polygons_from_rings_match_shapely_polygons_one_by_one():
    """The ragged-array build against shapely.polygons (the reference library) on rings
    of 1 to 9 vertices, non-convex ones and a NaN vertex included."""
    from latchwatch.analyzers.layout.polygons import polygons_from_rings

    rng = np.random.default_rng(3)
    counts = rng.integers(1, 10, 400)
    coords = rng.uniform(-50, 50, (int(counts.sum()), 2))
    coords[7] = np.nan
    offsets = np.concatenate([[0], np.cumsum(counts)])
    with np.errstate(invalid="ignore"):  # the NaN vertex
        built = polygons_from_rings(coords, offsets[:-1], np.diff(offsets))
    for i, count in enumerate(counts):
        ring = coords[offsets[i]:offsets[i + 1]]
        if count < 3:
            assert built[i].is_empty
        else:
            with np.errstate(invalid="ignore"):  # shapely warns of the NaN vertex
                reference = shapely.polygons(ring)
            assert np.array_equal(shapely.get_coordinates(built[i]), shapely.get_coordinates(reference),
                                  equal_nan=True), i


def test_rectangles_told_from_their_vertices_are_the_ones_shapely_finds():
    """rectangle_rings against geometry.axis_aligned_rectangles (shapely's bounds, area and
    vertex count) on rectangles, rotated and degenerate ones, triangles and bow ties."""
    from latchwatch.analyzers.layout.geometry import axis_aligned_rectangles
    from latchwatch.analyzers.layout.polygons import polygons_from_rings, rectangle_rings

    rng = np.random.default_rng(5)
    rings = []
    for _ in range(300):
        x0, y0 = rng.integers(-20, 20, 2).astype(float)
        w, h = rng.integers(0, 4, 2).astype(float)
        corners = [(x0, y0), (x0 + w, y0), (x0 + w, y0 + h), (x0, y0 + h)]
        pick = rng.integers(0, 5)
        if pick == 0:
            corners = corners[::-1]  # clockwise
        elif pick == 1:
            corners = corners[2:] + corners[:2]  # starting elsewhere
        elif pick == 2:
            corners = [corners[0], corners[2], corners[1], corners[3]]  # a bow tie
        elif pick == 3:
            corners = corners[:3]  # a triangle
        rings.append(np.array(corners, float))
    rings.append(np.array([(0, 0), (2, 0.5), (2, 1.5), (0, 1)]))  # a parallelogram, not axis-aligned
    counts = np.array([len(r) for r in rings])
    offsets = np.concatenate([[0], np.cumsum(counts)])
    coords = np.concatenate(rings)
    reference = axis_aligned_rectangles(polygons_from_rings(coords, offsets[:-1], counts))
    assert rectangle_rings(coords, offsets).tolist() == reference.tolist()
    assert 50 < reference.sum() < 250  # both kinds are there


def test_only_the_layers_asked_for_are_built():
    c = CellBuilder("TOP").rect(ACTIVE, 0, 0, 2, 1).rect(NWELL, 0, 0, 5, 5).polygon(ACTIVE, [(0, 0), (3, 0), (0, 3)])
    flat = flatten(layout(c), top=0)
    assert flat.shapes._missing.tolist() == [True, True, False]  # the triangle was built to be tested
    assert flat.polygons_at(flat.on_layer(ACTIVE))[0].bounds == (0.0, 0.0, 2.0, 1.0)
    assert flat.shapes._missing.tolist() == [False, True, False]
    assert flat.extent().tolist() == [0.0, 0.0, 5.0, 5.0] and flat.shapes._missing.tolist() == [False, True, False]
    assert flat.polygons[1].bounds == (0.0, 0.0, 5.0, 5.0) and not flat.shapes._missing.any()


# A ring as gdstk.boolean(rectangle((0, 0), (10, 10)), rectangle((2, 2), (8, 8)), "not") writes it:
# one outline that runs in to the hole and back out along the same cut (gdstk 1.0.2's output).
KEYHOLE_RING = [(10, 10), (0, 10), (0, 2), (2, 2), (2, 8), (8, 8), (8, 2), (2, 2), (0, 2), (0, 0), (10, 0)]


def test_a_keyhole_ring_is_read_as_a_polygon_with_a_hole_and_not_counted_as_broken():
    c = CellBuilder("TOP").polygon(ACTIVE, KEYHOLE_RING)
    flat = flatten(layout(c), top=0)
    assert flat.invalid.tolist() == []
    ring = flat.polygons[0]
    # shapely (the reference library): the same region built with its hole explicitly.
    expected = shapely.Polygon([(0, 0), (10, 0), (10, 10), (0, 10)], holes=[[(2, 2), (8, 2), (8, 8), (2, 8)]])
    assert shapely.is_valid(ring) and ring.normalize().equals(expected.normalize())
    assert not shapely.contains_xy(ring, 5, 5)


def test_a_repair_that_changes_the_area_is_broken_and_records_both_areas():
    doubly_wound = [(0, 0), (4, 0), (4, 4), (0, 4), (0, 0), (4, 0), (4, 4), (0, 4)]
    c = CellBuilder("TOP").polygon(ACTIVE, [(0, 0), (2, 2), (2, 0), (0, 2)]).polygon(ACTIVE, doubly_wound)
    flat = flatten(layout(c), top=0)
    assert flat.invalid.tolist() == [0, 1]
    # Bow tie: the two triangles' signed areas cancel as drawn (0), the repair keeps both (2).
    assert flat.invalid_area[0].tolist() == pytest.approx([0.0, 2.0])
    assert flat.invalid_area[1, 1] == pytest.approx(16.0)
    assert flat.invalid_area[1, 0] != pytest.approx(16.0)


@pytest.mark.parametrize("other", [[(0, 0), (3, 0), (0, 3)], [(-9, 0), (3, 0), (0, 3)], [(0, 0), (1, 1)],
                                   [(0, 0), (1, 1), (1, 0), (0, 1)], [(0, 0), (30, 40)]])
def test_the_extent_is_shapely_total_bounds_of_the_polygons(other):
    """The extent told mostly from vertices against shapely.total_bounds (the reference
    library) of every polygon: a triangle inside or reaching out, a degenerate ring (empty,
    so left out) whose vertices reach farther, and a bow tie."""
    c = CellBuilder("TOP").rect(ACTIVE, 0, 0, 2, 1).rect(NWELL, -1, -2, 5, 5).polygon(ACTIVE, other)
    flat = flatten(layout(c), top=0)
    assert flat.extent().tolist() == shapely.total_bounds(flat.polygons).tolist()


def test_two_threads_asking_for_overlapping_layers_get_every_polygon_built_once():
    import threading

    from latchwatch.analyzers.layout.polygons import LazyPolygons

    rng = np.random.default_rng(11)
    n = 20_000
    x, y = rng.uniform(0, 1000, (2, n))
    rings = np.stack([np.c_[x, y], np.c_[x + 1, y], np.c_[x + 1, y + 2], np.c_[x, y + 2]], axis=1).reshape(-1, 2)
    shapes = LazyPolygons(rings, np.arange(0, 4 * n + 1, 4))
    asks = [np.arange(0, n, 2), np.arange(0, n, 3)]
    got = [None, None]

    def ask(k):
        got[k] = shapes.at(asks[k])

    threads = [threading.Thread(target=ask, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    both = np.intersect1d(*asks)
    first = dict(zip(asks[0].tolist(), got[0], strict=True))
    second = dict(zip(asks[1].tolist(), got[1], strict=True))
    assert all(first[i] is second[i] for i in both.tolist())  # one polygon object per shape
    assert shapely.bounds(shapes.every()).tolist() == np.c_[x, y, x + 1, y + 2].tolist()


def test_rings_with_a_nan_or_infinite_first_vertex_are_reported_not_built():
    """GEOS refuses to close a ring whose first vertex is NaN (an infinite coordinate turns
    into NaN under a placement's transform): such rings are broken shapes, reported as such."""
    c = (CellBuilder("TOP").rect(ACTIVE, 0, 0, 2, 1)
         .polygon(ACTIVE, [(np.nan, 0), (3, 0), (3, 3)])
         .polygon(NWELL, [(-np.inf, 0), (np.inf, 0), (np.inf, 1), (-np.inf, 1)]))
    flat = flatten(layout(c), top=0)
    assert flat.invalid.tolist() == [1, 2]
    assert flat.invalid_reason.tolist() == ["NaN or infinite coordinates"] * 2
    assert flat.polygons[1].is_empty and flat.polygons[2].is_empty and not flat.rectangles[1:].any()
    assert flat.extent().tolist() == [0.0, 0.0, 2.0, 1.0]
