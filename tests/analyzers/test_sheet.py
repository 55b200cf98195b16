"""The sheet solver against analytic results, a direct reference solve, and itself on
finer grids (docs/performance.md, DEVELOPERS.md; analyzers/electrical/sheet.py)."""

import math

import numpy as np
import pytest
import scipy.sparse.linalg as spla
import shapely

from latchwatch.analyzers.electrical import sheet
from latchwatch.analyzers.electrical.sheet import SheetProblem, build_network, graded_lines, make_mesh, paint, solve

RS = 1000.0  # ohm per square; any value, the results scale with it
NONE = np.empty(0, dtype=object)


def shapes(*geoms):
    out = np.empty(len(geoms), dtype=object)
    out[:] = list(geoms)
    return out


def strip(length, width, electrode=1.0, grid=None):
    """A strip with full-width electrodes at both ends, ``length`` apart."""
    total = length + 2 * electrode
    return SheetProblem((0, 0, total, width), shapes(shapely.box(0, 0, total, width)), NONE,
                        shapes(shapely.box(total - electrode, 0, total, width)),
                        shapes(shapely.box(0, 0, electrode, width)), RS, grid)


def annulus(r1, r2, grid=None):
    """A disc electrode of radius r1 inside a grounded ring starting at r2."""
    disc = shapely.Point(0, 0).buffer(r1, quad_segs=128)
    outer = shapely.Point(0, 0).buffer(r2 + 1, quad_segs=128)
    ring = outer.difference(shapely.Point(0, 0).buffer(r2, quad_segs=128))
    side = r2 + 1
    return SheetProblem((-side, -side, side, side), shapes(outer), NONE, shapes(ring), shapes(disc), RS, grid)


def annulus_exact(r1, r2):
    # Analytic sheet resistance of an annulus (REFERENCE-VALUES.md, Physics): R = Rs / (2 pi) ln(r2 / r1).
    return RS / (2 * math.pi) * math.log(r2 / r1)


def l_shaped_well(grid=None):
    """An L of two 12 x 3 arms, a tap at the end of one arm, a device at the end of the other."""
    region = shapely.Polygon([(0, 0), (12, 0), (12, 3), (3, 3), (3, 12), (0, 12)])
    return SheetProblem((0, 0, 12, 12), shapes(region), NONE, shapes(shapely.box(0.5, 10.5, 2.5, 11.5)),
                        shapes(shapely.box(10, 0.5, 11, 2.5)), RS, grid)


@pytest.mark.parametrize("length, width", [(10.0, 2.0), (3.0, 6.0), (40.0, 5.0), (0.5, 4.0)])
def test_strip_with_full_width_electrodes(length, width):
    # Analytic sheet resistance of a strip (REFERENCE-VALUES.md, Physics): R = Rs L / W, within 2%.
    r = solve(strip(length, width)).resistance[0]
    assert r == pytest.approx(RS * length / width, rel=0.02)


@pytest.mark.parametrize("r1, r2", [(1.0, 5.0), (2.0, 8.0), (0.5, 6.0)])
def test_annulus_on_the_adaptive_grid(r1, r2):
    # R = Rs / (2 pi) ln(r2 / r1) (REFERENCE-VALUES.md, Physics), within 2%.
    assert solve(annulus(r1, r2)).resistance[0] == pytest.approx(annulus_exact(r1, r2), rel=0.02)


def test_annulus_converges_as_the_grid_is_refined():
    exact = annulus_exact(1.0, 5.0)
    errors = [abs(solve(annulus(1.0, 5.0, grid)).resistance[0] - exact) / exact for grid in (0.4, 0.2, 0.1, 0.05)]
    assert all(a > b for a, b in zip(errors, errors[1:], strict=False)), errors
    assert errors[-1] < 0.01


def test_strip_converges_from_above_as_the_grid_is_refined():
    # A strip between electrodes that do not span it (a tap and a device in a wide sheet)
    # has no closed form: each refinement must move the estimate down by less each time.
    def problem(grid):
        return SheetProblem(
            (0, 0, 20, 6), shapes(shapely.box(0, 0, 20, 6)), NONE, shapes(shapely.box(1, 2, 2, 4)),
            shapes(shapely.box(15, 1, 17, 3)), RS, grid)
    values = [solve(problem(grid)).resistance[0] for grid in (0.5, 0.25, 0.125, 0.0625)]
    steps = np.diff(values)
    assert (steps < 0).all(), values
    assert all(abs(a) > abs(b) for a, b in zip(steps, steps[1:], strict=False)), values


def test_l_shaped_well_against_a_much_finer_reference():
    # The documented bound (rule shunt-resistance): the adaptive grid is 0 to 6% above the
    # converged solution; the reference is a uniform grid of 0.05 um, 30 times finer than
    # the adaptive grid's coarse cells here.
    reference = solve(l_shaped_well(grid=0.05)).resistance[0]
    estimate = solve(l_shaped_well()).resistance[0]
    assert reference * 0.995 <= estimate <= reference * 1.06


def direct_equipotential(problem):
    """Reference: the device's cells held at 1 V, taps at 0, the free cells solved
    directly; R = 1 / (current out of the device)."""
    mesh, _ = make_mesh(problem)
    network = build_network(mesh, problem)
    label = paint(mesh, problem.devices, np.arange(len(problem.devices)))
    matrix = network.matrix.tocsr()
    out = []
    for k in range(len(problem.devices)):
        held = np.unique(network.node[(label == k) & (network.node >= 0)])
        rest = np.setdiff1d(np.arange(matrix.shape[0]), held)
        potential = spla.spsolve(matrix[rest][:, rest].tocsc(), -(matrix[rest][:, held] @ np.ones(len(held))))
        current = (matrix[held][:, held] @ np.ones(len(held))).sum() + (matrix[held][:, rest] @ potential).sum()
        out.append(1.0 / current)
    return np.array(out)


def test_batched_conjugate_gradients_match_a_direct_solve():
    # Several devices in one well, each an equipotential electrode while the others are sheet.
    taps = shapes(*[shapely.box(x, 3.8, x + 1, 4.7) for x in (0.5, 14.5, 28.5)])
    devices = shapes(*[shapely.box(x, 1.0, x + 2, 3.2) for x in (2.5, 5.5, 8.5, 11.5, 16.5, 19.5, 25.5)]
                     + [shapely.box(20, 0.5, 27, 1.5)])
    problem = SheetProblem((0, 0, 30, 5.8), shapes(shapely.box(0, 0, 30, 5.8)), NONE, taps, devices, RS)
    got = solve(problem).resistance
    expected = direct_equipotential(problem)
    # Every iterate is an upper bound (Thomson's principle); the stopping rule leaves < 0.5%.
    assert np.all(got >= expected * (1 - 1e-9))
    np.testing.assert_allclose(got, expected, rtol=0.005)


def test_resistance_scales_with_the_sheet_and_not_with_the_unit_of_length():
    base = solve(strip(8.0, 2.0)).resistance[0]
    scaled = SheetProblem((0, 0, 100, 20), shapes(shapely.box(0, 0, 100, 20)), NONE,
                          shapes(shapely.box(90, 0, 100, 20)), shapes(shapely.box(0, 0, 10, 20)), 2 * RS)
    assert solve(scaled).resistance[0] == pytest.approx(2 * base, rel=1e-6)


def test_unreachable_shorted_and_touching_devices():
    region = shapes(shapely.box(0, 0, 10, 4), shapely.box(20, 0, 30, 4))  # two separate parts
    devices = shapes(shapely.box(25, 1, 27, 3),  # in the part without a tap
                     shapely.box(1, 1, 2, 3),  # overlaps the tap
                     shapely.box(4, 1, 5, 3))  # butts against the tap's right edge
    problem = SheetProblem((0, 0, 30, 4), region, NONE, shapes(shapely.box(1.5, 0, 4, 4)), devices, RS)
    r = solve(problem).resistance
    assert r[0] == math.inf and r[1] == 0.0
    assert 0 < r[2] < 0.05 * RS  # only the sheet beside the butted edge separates them


def test_cut_out_regions_are_not_sheet():
    # A hole across the strip's whole width: no path. Half the width: the strip narrows.
    def hole(top):
        return SheetProblem((0, 0, 12, 2), shapes(shapely.box(0, 0, 12, 2)), shapes(shapely.box(5, 0, 6, top)),
                                        shapes(shapely.box(11, 0, 12, 2)), shapes(shapely.box(0, 0, 1, 2)), RS)
    assert solve(hole(2.0)).resistance[0] == math.inf
    assert solve(hole(1.0)).resistance[0] > RS * 10 / 2 * 1.05


def test_graded_lines_keep_fixed_lines_and_growth():
    lines = graded_lines(0.0, 50.0, np.array([10.0, 10.3, 40.0]), fine=0.1, coarse=4.0)
    assert {0.0, 10.0, 10.3, 40.0, 50.0} <= set(np.round(lines, 12))
    sizes = np.diff(lines)
    assert sizes.min() > 0 and sizes.max() <= 4.0 + 1e-9
    ratio = sizes[1:] / sizes[:-1]
    assert ratio.max() <= sheet.GROWTH * (1 + 1e-9) and ratio.min() >= 1 / sheet.GROWTH * (1 - 1e-9)


def test_grid_key_sets_the_largest_cell():
    mesh, _ = make_mesh(strip(10.0, 2.0, grid=0.25))
    assert np.diff(mesh.x).max() <= 0.25 + 1e-12 and np.diff(mesh.y).max() <= 0.25 + 1e-12
