"""analyzers/layout/geometry.py: grouped unions with rectangles pre-joined in bands give the
region shapely.union_all gives (the reference library), on random rectangle sets."""

from __future__ import annotations

import numpy as np
import pytest
import shapely

from latchwatch.analyzers.layout import geometry as g


def _same_region(a, b) -> bool:
    return shapely.equals(a, b) and shapely.area(shapely.symmetric_difference(a, b)) == 0


@pytest.mark.parametrize("seed", range(20))
def test_band_merge_keeps_the_union(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 60))
    # Few distinct y-extents and a coarse x grid, so that bands share extents, overlap and touch.
    y0 = rng.choice([0.0, 1.0, 2.5], n)
    height = rng.choice([1.0, 1.5], n)
    x0 = rng.integers(0, 30, n) * 0.5
    width = rng.integers(1, 8, n) * 0.5
    rects = shapely.box(x0, y0, x0 + width, y0 + height)
    others = np.array([shapely.Polygon([(0, 0), (3, 0), (1, 2)]), shapely.box(2, 2, 3, 3).buffer(0.2)], dtype=object)
    geoms = np.concatenate([rects, others[: seed % 3]])
    merged = g.band_merged(geoms)
    assert len(merged) <= len(geoms)
    assert _same_region(shapely.union_all(merged), shapely.union_all(geoms))


def test_touching_intervals_join_and_a_gap_of_one_grid_step_does_not():
    rects = shapely.box([0, 2, 4.001], [0, 0, 0], [2, 4, 5], [1, 1, 1])
    assert sorted(p.bounds for p in g.band_merged(rects)) == [(0.0, 0.0, 4.0, 1.0), (4.001, 0.0, 5.0, 1.0)]


def test_union_groups_per_group_matches_shapely():
    rects = shapely.box([0, 1, 10, 11, 20], [0, 0, 0, 0.5, 0], [2, 3, 12, 13, 21], [1, 1, 1, 1.5, 1])
    group = np.array([0, 0, 1, 1, 2])
    out = g.union_groups(rects, group, 3)
    for k in range(3):
        assert _same_region(out[k], shapely.union_all(rects[group == k]))
