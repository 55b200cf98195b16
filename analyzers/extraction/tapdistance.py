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


class TapIndex:
    """Nearest-tap queries restricted to the tap's body."""

    def __init__(self, taps: np.ndarray, body: np.ndarray):
        self.taps, self.body = taps, body
        self.tree = shapely.STRtree(taps) if len(taps) else None
        self._per_body: dict[int, tuple[shapely.STRtree, np.ndarray]] = {}
        hull_area = shapely.area(shapely.convex_hull(taps)) if len(taps) else np.zeros(0)
        self.convex = np.isclose(hull_area, shapely.area(taps), rtol=1e-9, atol=1e-12)
        self.bodies_with_taps = set(np.unique(body).tolist())

    def _body_tree(self, b: int):
        if b not in self._per_body:
            members = np.flatnonzero(self.body == b)
            self._per_body[b] = (shapely.STRtree(self.taps[members]), members)
        return self._per_body[b]

    def nearest(self, xy: np.ndarray, body: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(distance, tap index) of each point's nearest tap of the same body."""
        n = len(xy)
        dist, tap = np.full(n, np.inf), np.full(n, -1, np.int64)
        if self.tree is None or n == 0:
            return dist, tap
        pts = shapely.points(xy)
        (qi, ti), d = self.tree.query_nearest(pts, return_distance=True, all_matches=False)
        ok = self.body[ti] == body[qi]
        dist[qi[ok]], tap[qi[ok]] = d[ok], ti[ok]
        # Rare: the nearest tap overall belongs to another well; ask that body's own tree.
        rest = qi[~ok]
        for b in np.unique(body[rest]):
            if int(b) not in self.bodies_with_taps:
                continue
            sel = rest[body[rest] == b]
            tree, members = self._body_tree(int(b))
            (si, mi), d2 = tree.query_nearest(pts[sel], return_distance=True, all_matches=False)
            dist[sel[si]], tap[sel[si]] = d2, members[mi]
        return dist, tap

    def corner_bound(self, corners: np.ndarray, centre_xy: np.ndarray, tap: np.ndarray) -> np.ndarray:
        """Upper bound of the distance over each cell from its 4 corners (c, 4, 2)."""
        bound = np.full(len(tap), np.inf)
        has = tap >= 0
        if not has.any():
            return bound
        t = tap[has]
        c = corners[has]
        tap_geom = np.repeat(self.taps[t], 4)
        d_convex = shapely.distance(shapely.points(c.reshape(-1, 2)), tap_geom).reshape(-1, 4).max(axis=1)
        nearest_pt = shapely.get_coordinates(
            shapely.shortest_line(self.taps[t], shapely.points(centre_xy[has]))
        ).reshape(-1, 2, 2)[:, 0, :]
        d_point = np.linalg.norm(c - nearest_pt[:, None, :], axis=2).max(axis=1)
        bound[has] = np.where(self.convex[t], d_convex, d_point)
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
