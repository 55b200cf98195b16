"""The exact farthest-point search against analytic answers and a dense-sampling reference."""

import numpy as np
import pytest
import shapely
from hypothesis import example, given, settings
from hypothesis import strategies as st

from latchwatch.analyzers.extraction.tapdistance import DEFAULT_TOL, TapIndex, farthest_from_taps


def _run(diffs, taps, diff_body=None, tap_body=None, limit=None):
    diff_body = np.zeros(len(diffs), int) if diff_body is None else np.asarray(diff_body)
    tap_body = np.zeros(len(taps), int) if tap_body is None else np.asarray(tap_body)
    return farthest_from_taps(np.asarray(diffs), diff_body, TapIndex(np.asarray(taps), tap_body), limit,
                              exact=limit is None)


def test_far_corner_of_a_rectangle():
    # Analytic: a 10 x 2 diffusion beside a tap at x < 0; the far corner is hypot(10 + 1, 2) away.
    r = _run([shapely.box(0, 0, 10, 2)], [shapely.box(-3, 0, -1, 0.5)])
    assert r.value[0] == pytest.approx(np.hypot(11, 1.5), abs=DEFAULT_TOL)
    assert r.point[0].tolist() == [10.0, 2.0]


def test_interior_maximum_between_four_taps():
    # Analytic: taps at the four corners of a 10 x 10 square; the centre is 5 * sqrt(2) from each.
    taps = [shapely.Point(x, y) for x in (0, 10) for y in (0, 10)]
    taps = [t.buffer(1e-9, quad_segs=1) for t in taps]
    r = _run([shapely.box(0, 0, 10, 10)], taps)
    assert r.value[0] == pytest.approx(5 * np.sqrt(2), abs=2 * DEFAULT_TOL)
    assert np.allclose(r.point[0], [5, 5], atol=0.01)


def test_other_bodies_taps_do_not_count():
    # The tap of body 1 is much nearer, but only body 0's tap counts.
    r = _run([shapely.box(0, 0, 1, 1)], [shapely.box(2, 0, 3, 1), shapely.box(-20, 0, -19, 1)], [0], [1, 0])
    assert r.value[0] == pytest.approx(20.0, abs=DEFAULT_TOL)  # from x = 1 to the tap edge at x = -19
    assert r.tap[0] == 1


def test_no_tap_in_body_is_infinite():
    r = _run([shapely.box(0, 0, 1, 1)], [shapely.box(2, 0, 3, 1)], [0], [1])
    assert np.isinf(r.value[0]) and r.tap[0] == -1


def test_limit_short_cuts_but_never_hides_a_violation():
    diffs = [shapely.box(0, 0, 5, 1), shapely.box(0, 10, 30, 11)]
    taps = [shapely.box(-2, 0, -1, 11)]
    r = _run(diffs, taps, limit=np.array([20.0, 20.0]))
    assert r.within_limit.tolist() == [True, False]
    assert np.isnan(r.value[0])
    assert r.value[1] == pytest.approx(31.0, abs=DEFAULT_TOL)


def test_exactly_at_the_limit_passes_and_one_hundredth_beyond_fails():
    taps = [shapely.box(-1, 0, 0, 1)]
    at = _run([shapely.box(0, 0, 20, 1)], taps, limit=np.array([20.0]))
    beyond = _run([shapely.box(0, 0, 20.01, 1)], taps, limit=np.array([20.0]))
    assert at.within_limit[0] and not beyond.within_limit[0]


def _dense_reference(diff, tap_geoms, step):
    """Slow, obviously correct: sample the diffusion on a fine grid plus its vertices."""
    x0, y0, x1, y1 = diff.bounds
    # linspace, not arange: the edges themselves are sampled (arange's last row can land
    # a rounding error outside the diffusion and lose the edge, where the farthest point is).
    xs, ys = np.meshgrid(np.linspace(x0, x1, int(np.ceil((x1 - x0) / step)) + 1),
                         np.linspace(y0, y1, int(np.ceil((y1 - y0) / step)) + 1))
    pts = np.column_stack([xs.ravel(), ys.ravel()])
    # The boundary too, every `step`: a rotated edge passes between the grid's points.
    pts = np.concatenate([pts, shapely.get_coordinates(shapely.segmentize(diff.exterior, step))])
    inside = shapely.covers(diff, shapely.points(pts))
    union = shapely.union_all(tap_geoms)
    # Hypothesis draws coordinates like 1.7e-166, where GEOS warns of a division by zero
    # that does not reach the distances.
    with np.errstate(divide="ignore"):
        return shapely.distance(shapely.points(pts[inside]), union).max()


rect = st.tuples(
    st.floats(-20, 20), st.floats(-20, 20), st.floats(0.2, 12), st.floats(0.2, 12)
).map(lambda t: shapely.box(t[0], t[1], t[0] + t[2], t[1] + t[3]))


@settings(max_examples=60, deadline=None)
@given(diff=rect, taps=st.lists(rect, min_size=1, max_size=4), angle=st.floats(0, 180))
# Found by hypothesis: the farthest point is mid-edge, (1.5, 2), sqrt(1.25) = 1.118 um
# from both tap corners (analytic); the old arange grid lost that edge row.
@example(diff=shapely.box(0, 1, 2, 2), taps=[shapely.box(0, 0, 1, 1), shapely.box(2, 0, 3, 1)], angle=0.0)
@example(diff=shapely.box(0, 0, 2, 4), taps=[shapely.box(0, 0, 1, 1), shapely.box(0, 5, 1, 6)], angle=1.0)
def test_matches_dense_sampling(diff, taps, angle):
    from shapely import affinity

    diff = affinity.rotate(diff, angle, origin=(0, 0))
    taps = [affinity.rotate(t, angle / 2, origin=(1, 1)) for t in taps]
    step = 0.05
    ref = _dense_reference(diff, taps, step)
    got = _run([diff], taps).value[0]
    # The fast search is exact to 1 nm and can only be larger than any sampled value. A
    # point of the diffusion lies within a half-diagonal of a grid point, or, when that
    # grid point is outside, within a half-diagonal of the boundary and so within
    # (sqrt(2) + 1) / 2 steps of a boundary sample; distance is 1-Lipschitz.
    assert got >= ref - DEFAULT_TOL
    assert got <= ref + step * (np.sqrt(2) + 1) / 2 + DEFAULT_TOL


def _brute_nearest(xy, body, taps, tap_body):
    """Reference: shapely's distance from every point to every tap of its body, the least."""
    d = shapely.distance(shapely.points(xy)[:, None], taps[None, :])
    d = np.where(body[:, None] == tap_body[None, :], d, np.inf)
    return d.min(axis=1)


def _random_taps(rng, bodies, with_ring, n=60):
    """Rectangle taps of very different sizes (the proof uses the largest half-diagonal) in
    ``bodies`` bodies, and with ``with_ring`` a ring tap of body 0 (the general path)."""
    x0, y0 = rng.uniform(0, 100, n), rng.uniform(0, 100, n)
    taps = list(shapely.box(x0, y0, x0 + rng.choice([0.5, 2.0, 40.0], n), y0 + rng.choice([0.5, 3.0], n)))
    tap_body = list(rng.integers(0, bodies, n))
    if with_ring:
        taps.append(shapely.box(40, 40, 60, 60).difference(shapely.box(42, 42, 58, 58)))
        tap_body.append(0)
    return np.array(taps), np.array(tap_body)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), bodies=st.integers(1, 4), with_ring=st.booleans())
def test_rectangle_taps_nearest_matches_shapely(seed, bodies, with_ring):
    # The KD-tree path for rectangle taps must give shapely's distances, restricted to the body,
    # with rectangles of very different sizes (the proof uses the largest half-diagonal), and a
    # ring tap (the general path) mixed in.
    rng = np.random.default_rng(seed)
    taps, tap_body = _random_taps(rng, bodies, with_ring)
    xy = rng.uniform(-20, 120, (500, 2))
    xy[:50] = np.round(xy[:50])  # on the grid: ties between equally near taps
    body = rng.integers(0, bodies + 1, len(xy))  # the last body has no tap
    dist, tap = TapIndex(taps, tap_body).nearest(xy, body)
    expected = _brute_nearest(xy, body, taps, tap_body)
    assert np.allclose(dist, expected, rtol=1e-12, atol=1e-12)
    found = tap >= 0
    assert np.array_equal(found, np.isfinite(expected))
    assert np.all(tap_body[tap[found]] == body[found])
    assert np.allclose(shapely.distance(shapely.points(xy[found]), taps[tap[found]]), dist[found], rtol=1e-12, atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), bodies=st.integers(1, 4), with_ring=st.booleans())
def test_nearest_tap_to_shapes_matches_shapely(seed, bodies, with_ring):
    # Rectangles asked as rectangles (the Minkowski form of the KD-tree path), and a few
    # triangles (the general path), against shapely's polygon-to-polygon distance by brute force.
    rng = np.random.default_rng(seed)
    taps, tap_body = _random_taps(rng, bodies, with_ring)
    m = 300
    qx, qy = np.round(rng.uniform(-20, 120, (2, m)))  # on the grid: ties between equally near taps
    shapes = shapely.box(qx, qy, qx + rng.choice([0.5, 3.0, 25.0], m), qy + rng.choice([1.0, 8.0], m))
    shapes[:20] = shapely.polygons(np.stack([np.c_[qx[:20], qy[:20]], np.c_[qx[:20] + 3, qy[:20]],
                                             np.c_[qx[:20], qy[:20] + 2]], axis=1))
    body = rng.integers(0, bodies + 1, m)  # the last body has no tap
    dist, tap = TapIndex(taps, tap_body).nearest_to_shapes(shapes, body)
    d = np.where(body[:, None] == tap_body[None, :], shapely.distance(shapes[:, None], taps[None, :]), np.inf)
    expected = d.min(axis=1)
    assert np.allclose(dist, expected, rtol=1e-12, atol=1e-12)
    found = tap >= 0
    assert np.array_equal(found, np.isfinite(expected))
    assert np.allclose(shapely.distance(shapes[found], taps[tap[found]]), dist[found], rtol=1e-12, atol=1e-12)


def test_rectangle_corner_bound_is_the_farthest_corner_distance():
    # Analytic: a unit tap at the origin; the cell's corners (3, 0), (3, 4), ... are at most
    # hypot(2, 3) from it ((3, 4) to the tap corner (1, 1)).
    index = TapIndex(np.array([shapely.box(0, 0, 1, 1)]), np.array([0]))
    corners = np.array([[[2.0, 0.0], [3.0, 0.0], [3.0, 4.0], [2.0, 4.0]]])
    assert index.corner_bound(corners, np.array([[2.5, 2.0]]), np.array([0])).tolist() == [np.hypot(2, 3)]
