"""Guard-ring geometry (analyzers/extraction/rings.py): closure against a brute-force flood fill,
narrowest width, gaps and the distance to the ring against analytic answers."""

from collections import deque

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from latchwatch.analyzers.extraction import rings
from latchwatch.analyzers.extraction.extract import Pieces


def _pieces(geoms):
    geoms = np.asarray(geoms, dtype=object)
    return Pieces(geoms, np.arange(len(geoms)), np.full(len(geoms), -1, np.int64))


def _closed(tap_geoms, diff) -> bool:
    regions = rings.tap_regions(_pieces(tap_geoms), np.ones(len(tap_geoms), bool))
    return rings.innermost_holes(regions, np.array([diff], dtype=object), lambda d, r: np.ones(len(d), bool))[0] >= 0


def _square_ring(x0, y0, x1, y1, w):
    return shapely.box(x0, y0, x1, y1).difference(shapely.box(x0 + w, y0 + w, x1 - w, y1 - w))


# --- closure: brute force -------------------------------------------------------------

def _flood_fill_closed(tap_union, diff, size) -> bool:
    """Slow and obviously correct: on the unit grid (all coordinates are integers, so a
    cell is all tap or no tap), walk from a cell of the diffusion through free cells that
    share an edge; the ring is closed when the walk never leaves the drawing area. Cells
    that meet only at a corner do not let the walk through: a corner point of the tap is
    tap, which is the topological closure the checker uses."""
    xs, ys = np.meshgrid(np.arange(-1, size + 1), np.arange(-1, size + 1), indexing="ij")
    centres = shapely.points(xs.ravel() + 0.5, ys.ravel() + 0.5)
    tap = shapely.contains(tap_union, centres).reshape(xs.shape) if not tap_union.is_empty else np.zeros(xs.shape, bool)
    x0, y0 = int(diff.bounds[0]), int(diff.bounds[1])
    start = (x0 + 1, y0 + 1)  # grid index of the diffusion's first cell (offset by the -1 border)
    seen = np.zeros_like(tap)
    seen[start] = True
    todo = deque([start])
    last = tap.shape[0] - 1
    while todo:
        i, j = todo.popleft()
        if i in (0, last) or j in (0, last):
            return False
        for di, dj in ((1, 0), (-1, 0), (0, 1), (0, -1)):
            a, b = i + di, j + dj
            if not tap[a, b] and not seen[a, b]:
                seen[a, b] = True
                todo.append((a, b))
    return True


SIZE = 30
box_st = st.tuples(st.integers(0, SIZE - 1), st.integers(0, SIZE - 1), st.integers(1, 6), st.integers(1, 6))


@settings(max_examples=150, deadline=None)
@given(
    outer=st.tuples(st.integers(1, 8), st.integers(1, 8), st.integers(22, SIZE - 1), st.integers(22, SIZE - 1)),
    width=st.integers(1, 3),
    cuts=st.lists(st.tuples(st.integers(0, 3), st.integers(0, 28), st.integers(1, 4)), max_size=2),
    gaps=st.lists(box_st, max_size=3),
    blobs=st.lists(box_st, max_size=3),
    diff_at=st.tuples(st.integers(0, 6), st.integers(0, 6)),
)
def test_ring_closure_matches_flood_fill(outer, width, cuts, gaps, blobs, diff_at):
    """Random rings with random gaps: cuts across a side (side, offset, length), boxes
    removed anywhere, and extra tap blobs that may bridge a gap or close a ring of their own."""
    x0, y0, x1, y1 = outer  # the hole is at least 22 - 8 - 2 * 3 = 8 wide: the diffusion fits
    ring = _square_ring(x0, y0, x1, y1, width)
    across = []
    for side, offset, length in cuts:
        if side < 2:  # bottom or top side: cut along x
            x = x0 + offset % max(x1 - x0 - length, 1)
            y = y0 if side == 0 else y1 - width
            across.append(shapely.box(x, y, x + length, y + width))
        else:  # left or right side: cut along y
            y = y0 + offset % max(y1 - y0 - length, 1)
            x = x0 if side == 2 else x1 - width
            across.append(shapely.box(x, y, x + width, y + length))
    removed = across + [shapely.box(x, y, x + w, y + h) for x, y, w, h in gaps]
    cut = shapely.union_all(removed) if removed else shapely.Polygon()
    ring = ring.difference(cut)
    diff = shapely.box(x0 + width + diff_at[0], y0 + width + diff_at[1],
                       x0 + width + diff_at[0] + 2, y0 + width + diff_at[1] + 2)
    extra = [shapely.box(x, y, min(x + w, SIZE), min(y + h, SIZE)) for x, y, w, h in blobs]
    extra = [b for b in extra if not b.intersection(diff).area > 0]
    taps = np.concatenate([shapely.get_parts(ring), np.asarray(extra, dtype=object)])
    taps = taps[shapely.area(taps) > 0]
    union = shapely.union_all(taps) if len(taps) else shapely.Polygon()
    assert _closed(taps, diff) == _flood_fill_closed(union, diff, SIZE)


# --- width ------------------------------------------------------------------------------

def test_ring_exactly_two_um_wide_passes_and_one_hundredth_less_fails():
    # GF180MCU design manual, 56_IO_Latch-up1_156.csv IO.2 / 56_IO_Latch-up2_158.csv IO.4:
    # guard ring width >= 2 um. At the limit passes, 0.01 um below fails.
    diff = shapely.box(0, 0, 10, 4)
    at = _square_ring(-6, -6, 16, 10, 2.0)
    assert rings.narrowest_band(at, shapely.box(-4, -4, 14, 8), diff, 2.0) is None
    thin = shapely.box(-6, -6, 16, 10).difference(shapely.box(-4, -4, 14, 8.01))   # top side 1.99 wide
    got = rings.narrowest_band(thin, shapely.box(-4, -4, 14, 8.01), diff, 2.0)
    assert got is not None
    assert got.width == pytest.approx(1.99, abs=rings.DEFAULT_TOL)
    assert 8.01 <= got.location[1] <= 10  # on the thin top side


def test_narrowest_width_of_a_notch_and_its_place():
    # Analytic: a 3 um ring with a notch cut 2.2 um deep into its right side leaves 0.8 um.
    ring = _square_ring(0, 0, 30, 20, 3).difference(shapely.box(29 - 1.2, 9, 31, 11))
    hole = shapely.box(3, 3, 27, 17)
    got = rings.narrowest_band(ring, hole, shapely.box(10, 8, 14, 12), 2.0)
    assert got.width == pytest.approx(0.8, abs=rings.DEFAULT_TOL)
    assert 27 <= got.location[0] <= 27.8 + 1e-6 and 9 <= got.location[1] <= 11


def test_pieces_meeting_at_a_corner_close_the_ring_at_zero_width():
    pieces = [shapely.box(2, 0, 10, 2), shapely.box(0, 2, 2, 10), shapely.box(8, 0, 10, 10), shapely.box(0, 8, 10, 10)]
    diff = shapely.box(4, 4, 6, 6)
    assert _closed(pieces, diff)
    regions = rings.tap_regions(_pieces(pieces), np.ones(4, bool))
    [hole] = regions.holes
    got = rings.narrowest_band(regions.geoms[0], hole, diff, 2.0)
    assert got.width == pytest.approx(0.0, abs=rings.DEFAULT_TOL)
    assert np.hypot(*(got.location - [2, 2])) < 0.5  # at the corner joint


def test_a_blob_meeting_the_ring_at_two_corners_closes_it():
    # Found by the flood-fill test: the ring's left side has a 1 x 1 gap at y = 2..3 and a
    # separate tap square outside it meets the ring only at the gap's two outer corners.
    # The union of the two is a multipolygon (its parts share only points), yet nothing
    # escapes: the hole is bounded by both parts.
    ring = _square_ring(1, 1, 22, 22, 1).difference(shapely.box(0, 2, 2, 3))
    blob = shapely.box(0, 2, 1, 3)
    diff = shapely.box(2, 2, 4, 4)
    assert _closed(np.concatenate([shapely.get_parts(ring), [blob]]), diff)
    assert not _closed(shapely.get_parts(ring), diff)


# --- gaps ---------------------------------------------------------------------------------

def test_gap_location_and_width():
    # A 2 um ring around (0, 0)-(10, 4) with a 1.0 um gap cut in its left side at y = 1..2.
    ring = _square_ring(-4, -4, 14, 8, 2).difference(shapely.box(-5, 1, -1, 2))
    gap = rings.find_gap(ring, shapely.box(0, 0, 10, 4), 15.0)
    assert gap is not None and gap.count == 1
    assert -4 <= gap.location[0] <= -2 and 1 <= gap.location[1] <= 2
    assert gap.width == pytest.approx(1.0, abs=1e-3)


def test_two_gaps_are_counted():
    ring = _square_ring(-4, -4, 14, 8, 2).difference(shapely.box(-5, 1, -1, 2)).difference(shapely.box(6, 5, 7, 9))
    gap = rings.find_gap(ring, shapely.box(0, 0, 10, 4), 15.0)
    assert gap.count == 2


def test_taps_on_two_sides_are_no_ring():
    # Strips above and below close over the diffusion, not round it.
    taps = shapely.union_all([shapely.box(-4, -4, 14, -2), shapely.box(-4, 6, 14, 8)])
    assert rings.find_gap(taps, shapely.box(0, 0, 10, 4), 15.0) is None


def test_scattered_taps_are_no_ring():
    # Twelve 1 um squares on a circle of radius 12 round the diffusion, about 6 um apart: a
    # closing bridges them and leaves a hole, but the bridges, not taps, make most of its
    # edge (about 12 um of tap in some 75 um).
    angles = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    taps = shapely.union_all([shapely.box(12 * np.cos(a) - 0.5, 12 * np.sin(a) - 0.5,
                                          12 * np.cos(a) + 0.5, 12 * np.sin(a) + 0.5) for a in angles])
    diff = shapely.box(-1, -1, 1, 1)
    assert rings.find_gap(taps, diff, 15.0) is None


def test_no_gap_found_for_a_single_strip():
    assert rings.find_gap(shapely.box(-4, -4, 14, -2), shapely.box(0, 0, 10, 4), 3.0) is None


# --- distance -------------------------------------------------------------------------------

def test_a_ring_spaced_evenly_is_as_far_as_its_spacing():
    # Analytic: every edge point of the diffusion is 15 um from the ring's nearest side.
    diff = shapely.box(0, 0, 10, 4)
    ring = _square_ring(-17, -17, 27, 21, 2)
    value, point = rings.farthest_on_line(diff.exterior, np.array([ring], dtype=object))
    assert value == pytest.approx(15.0, abs=rings.DEFAULT_TOL)


def test_farthest_point_lies_inside_a_segment():
    # Analytic: the edge y = 0, x in [0, 10] between point targets at x = 0 and x = 10 (both
    # 3 below): farthest at x = 5, hypot(5, 3) away, not at a vertex.
    targets = shapely.points([[0, -3], [10, -3]])
    value, point = rings.farthest_on_line(shapely.LineString([(0, 0), (10, 0)]), targets)
    assert value == pytest.approx(np.hypot(5, 3), abs=rings.DEFAULT_TOL)
    assert point[0] == pytest.approx(5.0, abs=0.01)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.floats(-20, 20), st.floats(-20, 20)), min_size=1, max_size=5))
def test_farthest_on_line_matches_dense_sampling(target_xy):
    """Reference: sample the line every 1 nm-ish step (0.002 um); the 1-Lipschitz distance
    cannot rise more than half a step between samples."""
    line = shapely.LineString([(0, 0), (7, 3), (7, 9)])
    targets = shapely.points(np.asarray(target_xy))
    value, _ = rings.farthest_on_line(line, targets)
    step = 0.002
    samples = shapely.line_interpolate_point(line, np.arange(0, line.length + step, step))
    ref = shapely.distance(samples[:, None], targets[None, :]).min(axis=1).max()
    assert ref - 1e-9 <= value + rings.DEFAULT_TOL
    assert value <= ref + step / 2 + 1e-9
