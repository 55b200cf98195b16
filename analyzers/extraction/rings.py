"""Guard-ring geometry: closure, narrowest width, gaps and distance to the ring.

A tap region *surrounds* a diffusion when the diffusion lies inside the region's
filled outline: inside one of its holes, or, once a closing has filled a hole, under
it. Closure is topological: ring pieces that meet at a corner point close a ring (the
width check then reports that joint as 0 um wide).

Width. A ring is at least ``w`` wide around a diffusion when the ring eroded by w/2
still surrounds it: some closed band of width >= w goes all the way round. The
narrowest width is the largest w for which that holds (a bisection on the erosion
radius to ``tol``); the spot where it occurs is the part of the ring that the opening
at just above that radius removes and that spans the ring from its inner to its outer
edge. Erosion rounds reflex corners with arcs approximated by ``QUAD_SEGS`` chords
per quarter circle, so a ring may pass up to r (1 - cos(pi / (4 QUAD_SEGS))) narrower
than asked, at r = w/2: 0.03 nm for w = 2 um, which is below the 1 nm ``tol``.

Gaps. An open ring is closed by a morphological closing (dilate, then erode) with the
smallest radius, found by bisection, at which the closed taps surround the diffusion;
the gap is the added area that spans from the hole around the diffusion to the outside,
and its width the distance between the two ring ends beside it. It counts as an open
ring only when the diffusion then lies in a hole (not under the fill) and at least
MIN_RING_SHARE of that hole's edge is tap; otherwise there is no ring to speak of.

Distance. The farthest point of a diffusion's edge from its ring is found by a branch
and bound along the edge's segments (the distance is 1-Lipschitz along a segment, so an
interval [a, b] cannot exceed (f(a) + f(b) + |b - a|) / 2); exact to ``tol``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import shapely
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from latchwatch.analyzers.extraction.connectivity import meeting_pairs
from latchwatch.analyzers.extraction.extract import Pieces
from latchwatch.analyzers.layout import geometry as g

DEFAULT_TOL = 1e-3  # one nanometre in micrometre units
QUAD_SEGS = 32
_CLOSING_QUAD_SEGS = 4  # gaps are located, not measured, with the closing
GAP_TOL = 0.02  # um: the closing radius is found to this; the gap's width is measured apart
MIN_RING_SHARE = 0.5  # share of the closed hole's edge that must be tap for an "open ring"
_MAX_STEPS = 60


@dataclass
class TapRegions:
    """Tap pieces of one type merged into regions: pieces that meet and share a body."""

    geoms: np.ndarray  # one (multi)polygon per region
    body: np.ndarray
    contacted: np.ndarray  # bool: some member piece encloses a contact
    members: list[np.ndarray]  # piece indices of each region
    holes: np.ndarray  # hole polygons of all regions
    hole_owner: np.ndarray  # region index of each hole

    def __len__(self) -> int:
        return len(self.geoms)


def tap_regions(pieces: Pieces, contacted: np.ndarray) -> TapRegions:
    """Taps of one type merged into regions, with the holes they enclose and whether each is contacted."""
    n = len(pieces)
    if n == 0:
        empty = np.empty(0, dtype=object)
        return TapRegions(empty, np.zeros(0, np.int64), np.zeros(0, bool), [], empty, np.zeros(0, np.int64))
    i, j = meeting_pairs(pieces.geoms, pieces.geoms)
    same = pieces.body[i] == pieces.body[j]
    graph = coo_matrix((np.ones(int(same.sum()), np.int8), (i[same], j[same])), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    n_groups = int(label.max()) + 1
    merged = g.union_groups(pieces.geoms, label, n_groups)
    order = np.argsort(label, kind="stable")
    members = np.split(order, np.flatnonzero(np.diff(label[order])) + 1)
    contacted_group = np.zeros(n_groups, dtype=bool)
    contacted_group[label[contacted]] = True
    body = np.empty(n_groups, dtype=np.int64)
    body[label] = pieces.body
    holes, owner = _holes(merged)
    return TapRegions(merged, body, contacted_group, members, holes, owner)


def _holes(regions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The holes of each region, as polygons with the region's index. A polygon's holes
    are its interior rings. Pieces that meet only at points make a multipolygon, whose
    holes may be bounded by several parts: those are the parts of the free space around it
    that do not reach its bounding box's edge."""
    single = shapely.get_type_id(regions) == shapely.GeometryType.POLYGON
    polys = np.flatnonzero(single)
    counts = shapely.get_num_interior_rings(regions[polys])
    owner = np.repeat(polys, counts)
    index = np.arange(len(owner)) - np.repeat(np.cumsum(counts) - counts, counts)
    holes = [shapely.polygons(shapely.get_interior_ring(regions[owner], index))]
    owners = [owner]
    for k in np.flatnonzero(~single):  # few: unions through corner points
        x0, y0, x1, y1 = shapely.bounds(regions[k])
        frame = shapely.box(x0 - 1, y0 - 1, x1 + 1, y1 + 1)
        free = shapely.get_parts(shapely.difference(frame, regions[k]))
        bounded = free[~shapely.intersects(free, frame.exterior)]
        holes.append(bounded)
        owners.append(np.full(len(bounded), k, np.int64))
    return np.concatenate(holes), np.concatenate(owners)


def outline(region, hole):
    """The outer edge of ``region`` around ``hole``: the exterior of the filled region
    part that holds the hole."""
    whole = shapely.get_parts(shapely.union_all([filled(region), hole]))
    home = whole[shapely.covers(whole, hole)]
    return shapely.get_exterior_ring(home[0] if len(home) else whole[0])


def innermost_holes(regions: TapRegions, diffs: np.ndarray, body_ok) -> np.ndarray:
    """Per diffusion, the smallest hole of a region that contains it and whose region body
    passes ``body_ok(diff_index, region_index)`` (a mask over pairs), or -1."""
    out = np.full(len(diffs), -1, np.int64)
    if len(regions.holes) == 0 or len(diffs) == 0:
        return out
    d, h = shapely.STRtree(regions.holes).query(diffs, predicate="within")
    keep = body_ok(d, regions.hole_owner[h])
    d, h = d[keep], h[keep]
    if len(d) == 0:
        return out
    order = np.lexsort((shapely.area(regions.holes[h]), d))
    first = np.r_[True, d[order][1:] != d[order][:-1]]
    out[d[order][first]] = h[order][first]
    return out


def filled(geom) -> shapely.Geometry:
    """The geometry with every hole filled."""
    parts = shapely.get_parts(geom)
    parts = parts[shapely.get_type_id(parts) == shapely.GeometryType.POLYGON]
    if len(parts) == 0:
        return shapely.Polygon()
    return shapely.union_all(shapely.polygons(shapely.get_exterior_ring(parts)))


def surrounds(geom, diff) -> bool:
    """True when ``diff`` lies within ``geom`` with its holes filled (the ring encloses it)."""
    return bool(shapely.within(diff, filled(geom))) if not shapely.is_empty(geom) else False


def erode(geom, r: float):
    """``geom`` shrunk by ``r`` (unchanged for r <= 0)."""
    return shapely.buffer(geom, -r, quad_segs=QUAD_SEGS) if r > 0 else geom


def _spanning(parts: np.ndarray, inner, outer) -> np.ndarray:
    """The parts that reach both the inner and the outer line (within a hair)."""
    if len(parts) == 0:
        return parts
    hair = 1e-6
    return parts[shapely.dwithin(parts, inner, hair) & shapely.dwithin(parts, outer, hair)]


def _representative(parts: np.ndarray, near) -> np.ndarray:
    """A point of the part nearest ``near`` (on its surface)."""
    best = parts[int(np.argmin(shapely.distance(parts, near)))]
    return shapely.get_coordinates(shapely.point_on_surface(best))[0]


@dataclass
class Narrowest:
    """The narrowest width of a closed ring and a point where it occurs."""
    width: float  # um, exact to tol
    location: np.ndarray  # (2,) a point of the narrowest spot


def _bisect(lo: float, hi: float, below: Callable[[float], bool], done: Callable[[float, float], bool]):
    """Bracket the radius where a monotone test changes: ``below(r)`` is true for radii
    under it. Returns the final (lo, hi)."""
    for _ in range(_MAX_STEPS):
        if done(lo, hi):
            break
        mid = (lo + hi) / 2
        if below(mid):
            lo = mid
        else:
            hi = mid
    return lo, hi


def narrowest_band(region, hole, diff, min_width: float, tol: float = DEFAULT_TOL) -> Narrowest | None:
    """None when ``region`` holds a band at least ``min_width`` wide around ``diff``
    (to tol), else the narrowest width of its best band and where it occurs. ``hole``
    is the hole of ``region`` that holds ``diff``."""
    if surrounds(erode(region, min_width / 2 - tol / 2), diff):
        return None
    # Stop well below tol, so the reported figure reads as drawn.
    lo, hi = _bisect(0.0, min_width / 2, lambda r: surrounds(erode(region, r), diff),
                     lambda lo, hi: hi - lo <= 1e-7)
    opened = shapely.buffer(erode(region, hi), hi, quad_segs=QUAD_SEGS) if hi > 0 else region
    residue, _ = g.explode(np.array([shapely.difference(region, opened)], dtype=object), np.zeros(1, np.int64))
    inner, outer = shapely.get_exterior_ring(hole), outline(region, hole)
    span = _spanning(residue, inner, outer)
    pool = span if len(span) else residue
    where = _representative(pool, diff) if len(pool) else shapely.get_coordinates(
        shapely.shortest_line(inner, diff))[0]
    return Narrowest(lo + hi, where)


@dataclass
class Gap:
    """Where an open ring is open, and how wide the gap is when both ends are found."""
    location: np.ndarray  # (2,) a point in the gap
    width: float | None  # distance between the ring ends beside it, when two are found
    count: int  # gaps that had to be bridged


def closing(geom, r: float):
    """Morphological closing of ``geom`` by ``r``: grown, then shrunk, so gaps narrower than 2r close."""
    if r <= 0:
        return geom
    return shapely.buffer(shapely.buffer(geom, r, quad_segs=_CLOSING_QUAD_SEGS), -r, quad_segs=_CLOSING_QUAD_SEGS)


def find_gap(taps, diff, r_max: float, tol: float = GAP_TOL) -> Gap | None:
    """Where ``taps`` (one geometry: the tap area near ``diff``) fail to surround it,
    or None when no closing up to ``r_max`` makes them surround it."""
    if shapely.is_empty(taps) or not surrounds(closing(taps, r_max), diff):
        return None
    # The radius only finds the gap (its width is measured), so a coarse bracket will do.
    lo, hi = _bisect(0.0, r_max, lambda r: not surrounds(closing(taps, r), diff),
                     lambda lo, hi: hi - lo <= max(tol, hi / 8))
    closed = closing(taps, hi)
    parts = shapely.get_parts(closed)
    home = parts[shapely.within(diff, shapely.polygons(shapely.get_exterior_ring(parts)))]
    inner = _inner_line(home[0], diff) if len(home) else None
    # Taps on two sides close over the diffusion rather than round it, and scattered taps
    # bridged by long fills are not a ring: most of the hole's edge must be tap.
    if inner is None or (shapely.length(shapely.intersection(inner, shapely.buffer(taps, 1e-3)))
                         < MIN_RING_SHARE * shapely.length(inner)):
        return None
    added, _ = g.explode(np.array([shapely.difference(closed, taps)], dtype=object), np.zeros(1, np.int64))
    outer = shapely.get_exterior_ring(home[0])
    span = _spanning(added, inner, outer)
    pool = span if len(span) else added
    if len(pool) == 0:
        return None
    nearest = pool[int(np.argmin(shapely.distance(pool, diff)))]
    location = shapely.get_coordinates(shapely.point_on_surface(nearest))[0]
    return Gap(location, _gap_width(taps, nearest), max(len(span), 1))


def _inner_line(polygon, diff):
    """The boundary of the hole of ``polygon`` that holds ``diff``, or None when the
    closing covered the diffusion instead."""
    holes, _ = _holes(np.array([polygon], dtype=object))
    holding = holes[shapely.within(diff, holes)] if len(holes) else holes
    return shapely.get_exterior_ring(holding[0]) if len(holding) else None


def _gap_width(taps, gap) -> float | None:
    """Distance between the ring ends on either side of ``gap``."""
    ends, _ = g.explode(np.array([shapely.intersection(taps, shapely.buffer(gap, 1e-4))], dtype=object),
                        np.zeros(1, np.int64))
    if len(ends) < 2:
        return None
    d = shapely.distance(ends[:, None], ends[None, :])
    np.fill_diagonal(d, np.inf)
    return float(d.min(axis=1).max())


def farthest_on_line(line, targets: np.ndarray, tol: float = DEFAULT_TOL) -> tuple[float, np.ndarray]:
    """(distance, point): the point of ``line`` farthest from the nearest of ``targets``."""
    coords = shapely.get_coordinates(line)
    a, b = coords[:-1], coords[1:]
    tree = shapely.STRtree(targets)

    def dist(xy):
        (qi, _), d = tree.query_nearest(shapely.points(xy), return_distance=True, all_matches=False)
        out = np.empty(len(xy))
        out[qi] = d
        return out

    fa, fb = dist(a), dist(b)
    best_i = int(np.argmax(np.maximum(fa, fb)))
    best = float(max(fa[best_i], fb[best_i]))
    best_pt = a[best_i] if fa[best_i] >= fb[best_i] else b[best_i]
    for _ in range(_MAX_STEPS):
        upper = (fa + fb + np.linalg.norm(b - a, axis=1)) / 2
        alive = upper > best + tol
        if not alive.any():
            break
        a, b, fa, fb = a[alive], b[alive], fa[alive], fb[alive]
        m = (a + b) / 2
        fm = dist(m)
        k = int(np.argmax(fm))
        if fm[k] > best:
            best, best_pt = float(fm[k]), m[k]
        a, b = np.concatenate([a, m]), np.concatenate([m, b])
        fa, fb = np.concatenate([fa, fm]), np.concatenate([fm, fb])
    return best, np.asarray(best_pt, dtype=float)
