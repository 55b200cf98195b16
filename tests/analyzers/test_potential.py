"""The potential field of one device (analyzers/electrical/sheet.py potential_field)
against 1-D conduction and symmetry."""

import numpy as np
import pytest
import shapely

from latchwatch.analyzers.electrical.sheet import SheetProblem, potential_field, solve

RS = 1000.0
NONE = np.empty(0, dtype=object)


def shapes(*geoms):
    out = np.empty(len(geoms), dtype=object)
    out[:] = list(geoms)
    return out


def test_strip_potential_falls_linearly_and_the_tap_takes_all_current():
    # A 2 um wide strip, device electrode 0..1, tap 11..12: between them 1-D conduction,
    # R = Rs * L / W = 1000 * 10 / 2 = 5000 ohm, and the potential falls linearly (analytic).
    problem = SheetProblem((0, 0, 12, 2), shapes(shapely.box(0, 0, 12, 2)), NONE, shapes(shapely.box(11, 0, 12, 2)),
                           shapes(shapely.box(0, 0, 1, 2)), RS, 0.1)
    field = potential_field(problem)
    assert field.resistance == pytest.approx(5000, rel=0.02)
    assert field.resistance == pytest.approx(solve(problem).resistance[0], rel=1e-6)  # the same solution as the estimate
    assert field.tap_current.tolist() == pytest.approx([1.0])
    xc = (field.mesh.x[:-1] + field.mesh.x[1:]) / 2
    row = field.potential[len(field.mesh.y) // 2 - 1]
    for x in (3.0, 6.0, 9.0):
        assert row[np.argmin(abs(xc - x))] == pytest.approx((11 - x) / 10, abs=0.02)
    assert np.nanmin(field.potential) >= 0 and np.nanmax(field.potential) <= 1 + 1e-3


def test_current_splits_by_symmetry_and_by_distance():
    # The device in the middle of a 2 um strip between two taps: equal reaches take half each
    # (symmetry); with the right tap twice as far, 1-D conduction sends 2/3 to the near one.
    def shares(right):
        taps = shapes(shapely.box(-1, 0, 0, 2), shapely.box(right, 0, right + 1, 2))
        problem = SheetProblem((-1, 0, right + 1, 2), shapes(shapely.box(-1, 0, right + 1, 2)), NONE, taps,
                               shapes(shapely.box(5, 0, 6, 2)), RS, 0.1)
        return potential_field(problem).tap_current

    assert shares(11).tolist() == pytest.approx([0.5, 0.5], abs=0.01)
    assert shares(16).tolist() == pytest.approx([2 / 3, 1 / 3], abs=0.02)
