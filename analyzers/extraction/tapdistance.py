"""Farthest point of a diffusion from the taps of its body, exact to a tolerance.

The distance to the nearest tap is 1-Lipschitz, so a branch and bound over square
cells converges: a cell's lower bound is the distance at its evaluated points that lie
in the diffusion, its upper bound the largest distance from the cell's corners to the
tap nearest its centre (exact for convex taps, since distance to a convex set is a
convex function; for other taps the nearest point of the tap is used). Cells whose
upper bound cannot beat the best lower bound by more than ``tol`` (or cannot exceed a
given limit) are dropped. The result is exact to ``tol``: the true maximum lies in
[value, value + tol]. All cells of all diffusions are processed together, level by level.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely
from scipy.spatial import cKDTree

from latchwatch.analyzers.layout.geometry import bounds_and_rectangles

DEFAULT_TOL = 1e-3  # one nanometre in micrometre units
MAX_LEVELS = 40
SLACK = 1e-6  # floating-point slack when comparing against a limit


@dataclass
class FarthestPoints:
    """Per diffusion: the farthest point from the taps, its distance, its nearest tap, and whether it is within the limit."""
    value: np.ndarray  # max distance (nan where not needed: proven within the limit)
    point: np.ndarray  # (n, 2) farthest point found
    tap: np.ndarray  # nearest tap index at that point, -1 when the body has no tap
    within_limit: np.ndarray  # bool: proven max <= limit (+ SLACK)


BOX_CANDIDATES = 8  # nearest tap-rectangle centres looked at per point before proving the answer
TIE = 1e-9  # relative: two taps this close in distance are a tie, settled the general way


def box_distance(xy: np.ndarray, boxes: np.ndarray) -> np.ndarray:
    """Euclidean distance from points (..., 2) to filled rectangles (..., 4: x0, y0, x1, y1); 0 inside.

    >>> box_distance(np.array([[4.0, 5.0], [1.0, 0.5]]), np.array([[0.0, 0.0, 1.0, 1.0]] * 2)).tolist()
    [5.0, 0.0]
    """
    dx = np.maximum(np.maximum(boxes[..., 0] - xy[..., 0], xy[..., 0] - boxes[..., 2]), 0.0)
    dy = np.maximum(np.maximum(boxes[..., 1] - xy[..., 1], xy[..., 1] - boxes[..., 3]), 0.0)
    return np.hypot(dx, dy)


class _BoxNearest:
    """Nearest axis-aligned rectangle tap of the point's body: a KD-tree over the
    rectangles' centres, the body as a third coordinate spaced so far apart that other
    bodies come last, and the exact rectangle distance to the nearest few centres.

    The answer is proven (``sure``) when every rectangle not looked at is farther: its
    centre is at least as far as the last one looked at, and a rectangle is no nearer
    than its centre less its half-diagonal. Unproven points and ties go the general way."""

    def __init__(self, bounds: np.ndarray, body: np.ndarray, members: np.ndarray):
        self.bounds, self.body, self.members = bounds, body, members
        centre = (bounds[:, :2] + bounds[:, 2:]) / 2
        self.reach = float(np.max(np.hypot(bounds[:, 2] - bounds[:, 0], bounds[:, 3] - bounds[:, 1]))) / 2
        extent = float(np.hypot(*(bounds[:, 2:].max(axis=0) - bounds[:, :2].min(axis=0))))
        self.spacing = 4.0 * (extent + self.reach + 1.0)
        self.tree = cKDTree(np.column_stack([centre, body.astype(np.float64) * self.spacing]))
        self.bodies = np.unique(body)

    def nearest(self, xy: np.ndarray, body: np.ndarray, half: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(distance, tap index, sure) per point; distance inf where the body has no rectangle tap.

        With ``half`` (n, 2), each query is the rectangle centred on its point with those
        half-sides: its distance to a tap rectangle is the point's distance to the tap
        grown by them (a Minkowski sum), and it reaches its half-diagonal nearer."""
        n, k = len(xy), min(BOX_CANDIDATES, len(self.bounds))
        centre_d, cand = self.tree.query(np.column_stack([xy, body.astype(np.float64) * self.spacing]), k=k)
        centre_d, cand = centre_d.reshape(n, k), cand.reshape(n, k)
        found = cand < len(self.bounds)
        cand = np.where(found, cand, 0)
        same = found & (self.body[cand] == body[:, None])
        boxes = self.bounds[cand]
        if half is not None:
            boxes = boxes + np.concatenate([-half, half], axis=1)[:, None, :]
        d = np.where(same, box_distance(xy[:, None, :], boxes), np.inf)
        col = np.argmin(d, axis=1)
        rows = np.arange(n)
        best = d[rows, col]
        second = np.partition(d, 1, axis=1)[:, 1] if k > 1 else np.full(n, np.inf)
        unseen = centre_d[:, -1] - self.reach - (0.0 if half is None else np.hypot(half[:, 0], half[:, 1]))
        margin = TIE * (1.0 + best)
        sure = (unseen > best + margin) & (second > best + margin)
        sure |= ~np.isin(body, self.bodies)  # no rectangle tap in that body at all
        tap = np.where(np.isfinite(best), self.members[cand[rows, col]], -1)
        return best, tap, sure


class _TreeNearest:
    """Nearest of a subset of the taps (``members``, global indices) by shapely's STRtree,
    restricted to the point's body: the general path, for any tap shape."""

    def __init__(self, taps: np.ndarray, body: np.ndarray, members: np.ndarray):
        self.taps, self.body, self.members = taps[members], body[members], members
        self.tree = shapely.STRtree(self.taps) if len(members) else None
        self._per_body: dict[int, tuple[shapely.STRtree, np.ndarray]] = {}
        self.bodies_with_taps = set(np.unique(self.body).tolist())

    def _body_tree(self, b: int):
        if b not in self._per_body:
            local = np.flatnonzero(self.body == b)
            self._per_body[b] = (shapely.STRtree(self.taps[local]), local)
        return self._per_body[b]

    def nearest(self, xy: np.ndarray, body: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return self.nearest_to(shapely.points(xy), body)

    def nearest_to(self, pts: np.ndarray, body: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(distance, tap index) from each geometry to the nearest tap of its body."""
        n = len(pts)
        dist, tap = np.full(n, np.inf), np.full(n, -1, np.int64)
        if self.tree is None or n == 0:
            return dist, tap
        (qi, ti), d = self.tree.query_nearest(pts, return_distance=True, all_matches=False)
        ok = self.body[ti] == body[qi]
        dist[qi[ok]], tap[qi[ok]] = d[ok], ti[ok]
        # Rare: the nearest tap overall belongs to another well; ask that body's own tree.
        rest = qi[~ok]
        for b in np.unique(body[rest]):
            if int(b) not in self.bodies_with_taps:
                continue
            sel = rest[body[rest] == b]
            tree, local = self._body_tree(int(b))
            (si, mi), d2 = tree.query_nearest(pts[sel], return_distance=True, all_matches=False)
            dist[sel[si]], tap[sel[si]] = d2, local[mi]
        found = tap >= 0
        tap[found] = self.members[tap[found]]
        return dist, tap


class TapIndex:
    """Nearest-tap queries restricted to the tap's body: rectangle taps through a KD-tree
    with exact rectangle distance, other shapes (rings, L shapes) through shapely."""

    def __init__(self, taps: np.ndarray, body: np.ndarray):
        self.taps, self.body = taps, body
        self.bounds, self.is_box = bounds_and_rectangles(taps)
        others = np.flatnonzero(~self.is_box)
        self.convex = self.is_box.copy()
        if len(others):
            hull_area = shapely.area(shapely.convex_hull(taps[others]))
            self.convex[others] = np.isclose(hull_area, shapely.area(taps[others]), rtol=1e-9, atol=1e-12)
        boxes = np.flatnonzero(self.is_box)
        self._boxes = _BoxNearest(self.bounds[boxes], body[boxes], boxes) if len(boxes) else None
        self._others = _TreeNearest(taps, body, others) if len(others) and len(boxes) else None
        self._general: _TreeNearest | None = None

    def _every_tap(self) -> _TreeNearest:
        """The general path over all taps, built the first time a point needs it."""
        if self._general is None:
            self._general = _TreeNearest(self.taps, self.body, np.arange(len(self.taps)))
        return self._general

    def nearest(self, xy: np.ndarray, body: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(distance, tap index) of each point's nearest tap of the same body."""
        return self._nearest(xy, body, None, None)

    def nearest_to_shapes(self, geoms: np.ndarray, body: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(distance, tap index) of each polygon's nearest tap of the same body: rectangles
        through the KD-tree as rectangles, other shapes the general way."""
        n = len(geoms)
        if n == 0 or len(self.taps) == 0:
            return np.full(n, np.inf), np.full(n, -1, np.int64)
        bounds, is_box = bounds_and_rectangles(geoms)
        dist, tap = np.full(n, np.inf), np.full(n, -1, np.int64)
        boxes, others = np.flatnonzero(is_box), np.flatnonzero(~is_box)
        b = bounds[boxes]
        dist[boxes], tap[boxes] = self._nearest((b[:, :2] + b[:, 2:]) / 2, body[boxes], (b[:, 2:] - b[:, :2]) / 2,
                                                geoms[boxes])
        if len(others):
            dist[others], tap[others] = self._every_tap().nearest_to(geoms[others], body[others])
        return dist, tap

    def _nearest(self, xy, body, half, shapes) -> tuple[np.ndarray, np.ndarray]:
        """Points (``half`` None) or rectangles (centre, half-sides, and their ``shapes``
        for the general way) to the nearest tap of their body."""
        n = len(xy)
        if n == 0 or len(self.taps) == 0:
            return np.full(n, np.inf), np.full(n, -1, np.int64)

        def queries(rows):  # geometries only for the queries that go the general way
            return shapely.points(xy[rows]) if shapes is None else shapes[rows]

        if self._boxes is None:
            return self._every_tap().nearest_to(queries(slice(None)), body)
        dist, tap, sure = self._boxes.nearest(xy, body, half)
        if self._others is not None:
            d2, t2 = self._others.nearest_to(queries(slice(None)), body)
            both = np.isfinite(d2) & np.isfinite(dist)
            sure[both] &= np.abs(d2[both] - dist[both]) > TIE * (1.0 + np.minimum(d2[both], dist[both]))
            closer = d2 < dist
            dist, tap = np.where(closer, d2, dist), np.where(closer, t2, tap)
        redo = np.flatnonzero(~sure)
        if len(redo):
            dist[redo], tap[redo] = self._every_tap().nearest_to(queries(redo), body[redo])
        return dist, tap

    def corner_bound(self, corners: np.ndarray, centre_xy: np.ndarray, tap: np.ndarray) -> np.ndarray:
        """Upper bound of the distance over each cell from its 4 corners (c, 4, 2)."""
        bound = np.full(len(tap), np.inf)
        has = np.flatnonzero(tap >= 0)
        if len(has) == 0:
            return bound
        t = tap[has]
        box = self.is_box[t]
        # Rectangles (convex): the farthest corner's exact distance to the rectangle.
        bound[has[box]] = box_distance(corners[has[box]], self.bounds[t[box]][:, None, :]).max(axis=1)
        rest, t = has[~box], t[~box]
        if len(rest) == 0:
            return bound
        c = corners[rest]
        tap_geom = np.repeat(self.taps[t], 4)
        d_convex = shapely.distance(shapely.points(c.reshape(-1, 2)), tap_geom).reshape(-1, 4).max(axis=1)
        nearest_pt = shapely.get_coordinates(
            shapely.shortest_line(self.taps[t], shapely.points(centre_xy[rest]))
        ).reshape(-1, 2, 2)[:, 0, :]
        d_point = np.linalg.norm(c - nearest_pt[:, None, :], axis=2).max(axis=1)
        bound[rest] = np.where(self.convex[t], d_convex, d_point)
        return bound


def farthest_from_taps(
    diffs: np.ndarray,
    body: np.ndarray,
    taps: TapIndex,
    limit: np.ndarray | None = None,
    tol: float = DEFAULT_TOL,
    exact: bool = False,
) -> FarthestPoints:
    """For each diffusion polygon, the farthest point from the nearest tap of its body.

    ``within_limit`` says which diffusions are proven within ``limit`` (per diffusion,
    nan for none). Unless ``exact``, work stops for a diffusion once that is proven and
    its value is then nan; violations and ``exact`` values are always computed to ``tol``.

    >>> import shapely, numpy as np
    >>> t = TapIndex(shapely.box([0.0], [0.0], [1.0], [1.0]), np.array([0]))
    >>> r = farthest_from_taps(shapely.box([4.0], [0.0], [5.0], [1.0]), np.array([0]), t, exact=True)
    >>> round(float(r.value[0]), 6), r.point[0].tolist()
    (4.0, [5.0, 0.0])
    """
    n = len(diffs)
    best = np.full(n, -np.inf)
    best_pt = np.zeros((n, 2))
    best_tap = np.full(n, -1, np.int64)
    cap = np.full(n, np.inf) if limit is None else np.where(np.isnan(limit), np.inf, limit) + SLACK
    prune = np.full(n, -np.inf) if exact else cap
    if n == 0:
        return FarthestPoints(best, best_pt, best_tap, np.zeros(0, bool))

    def offer(idx, xy, d, tap):
        """Raise the lower bounds with evaluated points that lie in their diffusion."""
        if len(idx) == 0:
            return
        order = np.lexsort((-d, idx))
        first = np.r_[True, idx[order][1:] != idx[order][:-1]]
        sel = order[first]
        better = d[sel] > best[idx[sel]]
        s = sel[better]
        best[idx[s]], best_pt[idx[s]], best_tap[idx[s]] = d[s], xy[s], tap[s]

    bounds = shapely.bounds(diffs)
    todo = np.arange(n)
    if not exact:
        # Most diffusions sit well within reach of a tap: one query at the centre of the
        # bounding box plus its half-diagonal (the function is 1-Lipschitz) settles them.
        centre = (bounds[:, :2] + bounds[:, 2:]) / 2
        dc, _ = taps.nearest(centre, body)
        half_diag = np.hypot(bounds[:, 2] - bounds[:, 0], bounds[:, 3] - bounds[:, 1]) / 2
        settled = dc + half_diag <= cap
        best[settled] = dc[settled]
        todo = np.flatnonzero(~settled)

    # Level 0: every vertex of every remaining diffusion (vertices always lie in it).
    rings = shapely.get_exterior_ring(diffs[todo])
    coords = shapely.get_coordinates(rings)
    owner = todo[np.repeat(np.arange(len(todo)), shapely.get_num_coordinates(rings))]
    d, tap = taps.nearest(coords, body[owner])
    offer(owner, coords, d, tap)
    no_tap = ~np.isfinite(best)

    # Cells: the bounding box of each diffusion, as rectangles (x0, y0, x1, y1).
    cell_owner = todo[~no_tap[todo]]
    cells = bounds[cell_owner]
    for _ in range(MAX_LEVELS):
        if len(cells) == 0:
            break
        centre = np.column_stack([(cells[:, 0] + cells[:, 2]) / 2, (cells[:, 1] + cells[:, 3]) / 2])
        cd, ctap = taps.nearest(centre, body[cell_owner])
        inside = shapely.contains_xy(diffs[cell_owner], centre[:, 0], centre[:, 1])
        if inside.any():
            offer(cell_owner[inside], centre[inside], cd[inside], ctap[inside])
        corners = np.stack(
            [cells[:, [0, 1]], cells[:, [2, 1]], cells[:, [2, 3]], cells[:, [0, 3]]], axis=1
        )
        upper = taps.corner_bound(corners, centre, ctap)
        alive = (upper > best[cell_owner] + tol) & (upper > prune[cell_owner])
        if not alive.any():
            break
        cells, cell_owner, centre = cells[alive], cell_owner[alive], centre[alive]
        # Keep only cells that still touch their diffusion.
        touching = shapely.intersects(diffs[cell_owner], shapely.box(*cells.T))
        cells, cell_owner, centre = cells[touching], cell_owner[touching], centre[touching]
        # Split each cell in four.
        x0, y0, x1, y1 = cells.T
        cx, cy = centre.T
        cells = np.concatenate(
            [np.column_stack(q) for q in ((x0, y0, cx, cy), (cx, y0, x1, cy), (x0, cy, cx, y1), (cx, cy, x1, y1))]
        )
        cell_owner = np.tile(cell_owner, 4)
    within = (best <= cap) & ~no_tap
    value = best.copy()
    if not exact:
        # Proven within the limit, but not computed to tol: no value to claim.
        value[within] = np.nan
    value[no_tap] = np.inf
    return FarthestPoints(value, best_pt, best_tap, within)
