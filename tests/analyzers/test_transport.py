"""Minority-carrier transport (analyzers/electrical/transport.py) against analytic
solutions of steady diffusion with recombination, and against itself on finer grids."""

import math

import numpy as np
import pytest
import shapely
from scipy.special import i0, i1, k0, k1

from latchwatch.analyzers.electrical.transport import TransportProblem, collect

NONE = np.empty(0, dtype=object)


def shapes(*geoms):
    out = np.empty(len(geoms), dtype=object)
    out[:] = list(geoms)
    return out


def line_injector(length, distance, grid=None, behind=6.0, width=0.2, height=4.0):
    """A thin full-height injector strip ``distance`` from an absorbing strip, with
    ``behind`` diffusion lengths of sheet on its other side."""
    back = behind * length
    plane = back + width + distance
    box = (0.0, 0.0, plane + 2.0, height)
    return TransportProblem(box, shapes(shapely.box(*box)), shapes(shapely.box(plane, 0, plane + 2.0, height)),
                            np.array([0]), shapely.box(back, 0, back + width, height), length, grid=grid)


@pytest.mark.parametrize("ratio", [1 / 3, 5 / 6])
def test_line_injector_collects_exp_minus_d_over_l(ratio):
    """Analytic: in 1-D, D n'' = n / tau, i.e. n'' = n / L^2. A line source of unit current
    at x = 0 and an absorbing plane at x = d (n(d) = 0), the sheet running on to -inf on
    the other side. For x < 0: n = A exp(x / L) (bounded); for 0 < x < d:
    n = B sinh((d - x) / L). Continuity at 0: A = B sinh(d / L). The source is the jump of
    the flux there: 1 = D (B cosh(d / L) + A) / L = D B exp(d / L) / L. The plane collects
    D B / L (the flux -D n'(d)), so the collected fraction is exp(-d / L)."""
    length = 30.0
    distance = ratio * length
    result = collect(line_injector(length, distance), 1)
    # The injector is 0.2 um thick; its current enters at both faces, so its centre is the
    # line source: d is measured from there.
    expected = math.exp(-(distance + 0.1) / length)
    assert result.collected[0] == pytest.approx(expected, rel=0.05)
    assert result.collected[0] == pytest.approx(expected, rel=0.01)  # what the grid actually does
    assert result.collected[0] + result.recombined == pytest.approx(1.0, abs=1e-9)


def bessel_fractions(r1, r0, r2, length):
    """Analytic: a ring source of unit current at radius r0 between absorbing circles r1 and
    r2. In polar symmetry n'' + n' / r = n / L^2 is the modified Bessel equation of order 0,
    so n = a I0(r / L) + b K0(r / L). Vanishing at r1 and at r2:
    n = A f(r, r1) inside and B f(r, r2) outside, f(r, c) = I0(r/L) K0(c/L) - K0(r/L) I0(c/L),
    with A f(r0, r1) = B f(r0, r2) (continuity) and the source equal to the jump in flux
    2 pi r0 D (A f'(r0, r1) - B f'(r0, r2)); I0' = I1 and K0' = -K1. Each circle collects
    2 pi r D |n'(r)|. Returns (inner fraction, outer fraction)."""
    def f(r, c):
        return i0(r / length) * k0(c / length) - k0(r / length) * i0(c / length)

    def df(r, c):
        return (i1(r / length) * k0(c / length) + k1(r / length) * i0(c / length)) / length

    a = 1.0
    b = a * f(r0, r1) / f(r0, r2)
    source = r0 * (a * df(r0, r1) - b * df(r0, r2))
    return r1 * a * df(r1, r1) / source, -r2 * b * df(r2, r2) / source


@pytest.mark.parametrize("r1, r0, r2, length", [(2.0, 6.0, 15.0, 10.0), (1.0, 4.0, 20.0, 8.0)])
def test_ring_injector_between_absorbing_circles_matches_bessel(r1, r0, r2, length):
    # Reference: the modified-Bessel solution above, with scipy.special k0, i0 (and k1, i1).
    inner, outer = bessel_fractions(r1, r0, r2, length)

    def disc(r):
        return shapely.Point(0, 0).buffer(r, quad_segs=64)

    side = r2 + 1
    problem = TransportProblem((-side, -side, side, side), shapes(disc(side)),
                               shapes(disc(r1), disc(side).difference(disc(r2))), np.array([0, 1]),
                               disc(r0 + 0.1).difference(disc(r0 - 0.1)), length)
    result = collect(problem, 2)
    assert result.collected[0] == pytest.approx(inner, rel=0.05)
    assert result.collected[1] == pytest.approx(outer, rel=0.05)
    assert result.collected.sum() + result.recombined == pytest.approx(1.0, abs=1e-9)


def test_converges_under_refinement():
    # Self-consistency: uniform grids of 1, 1/2 and 1/4 um; the differences shrink (first
    # order or better) and the adaptive default lies within 1% of the finest.
    length, distance = 20.0, 12.0
    values = [collect(line_injector(length, distance, grid=h, behind=4.0), 1).collected[0] for h in (1.0, 0.5, 0.25)]
    first, second = abs(values[1] - values[0]), abs(values[2] - values[1])
    assert second <= 0.6 * first
    adaptive = collect(line_injector(length, distance, behind=4.0), 1).collected[0]
    assert adaptive == pytest.approx(values[2], rel=0.01)


def test_a_sink_of_vanishing_length_is_an_absorber_and_a_long_one_passes_carriers():
    """The same plane as a finite-strength sink: as its sink length goes to 0 it takes what
    an absorbing plane takes; with a sink length far above L it takes almost nothing."""
    length, distance = 30.0, 10.0
    absorbing = collect(line_injector(length, distance), 1).collected[0]
    base = line_injector(length, distance)

    def as_sink(sink_length):
        problem = TransportProblem(base.box, base.include, NONE, np.zeros(0, np.int64), base.injector, length,
                                   sinks=base.absorbers, sink_label=base.label, sink_length=sink_length)
        return collect(problem, 1).collected[0]

    assert as_sink(0.05) == pytest.approx(absorbing, rel=0.03)
    assert as_sink(0.05) < absorbing  # a finite sink lets the density at its face stay above 0
    assert as_sink(3000.0) < 0.01
    assert as_sink(1.0) < as_sink(0.3) < as_sink(0.05)


def test_a_deep_sink_slab_matches_the_one_dimensional_solution():
    """Analytic, D = 1 and a unit line source at x = 0: for x < 0, n = A exp(x / L); for
    0 < x < d, n = B cosh(x / L) + C sinh(x / L); in the sink x > d, n'' = n / Le^2 with
    1 / Le^2 = 1 / L^2 + 1 / Ls^2, so n = E exp(-(x - d) / Le). Continuity of n and of the
    flux at 0 (with the unit jump) and at d fixes A, B, C, E; the sink takes
    integral(n / Ls^2) = E Le / Ls^2 of the current."""
    length, distance, sink_length = 30.0, 10.0, 3.0
    le = 1 / math.sqrt(1 / length ** 2 + 1 / sink_length ** 2)
    ch, sh = math.cosh(distance / length), math.sinh(distance / length)
    system = np.array([[1, -1, 0, 0], [-1 / length, 0, 1 / length, 0], [0, ch, sh, -1],
                       [0, sh / length, ch / length, 1 / le]])
    a, b, c, e = np.linalg.solve(system, [0, -1, 0, 0])
    expected = e * le / sink_length ** 2
    base = line_injector(length, distance)
    plane = base.absorbers[0].bounds[0]
    box = (0.0, 0.0, plane + 12 * le, 4.0)
    problem = TransportProblem(box, shapes(shapely.box(*box)), NONE, np.zeros(0, np.int64), base.injector, length,
                               sinks=shapes(shapely.box(plane, 0, box[2], 4.0)), sink_label=np.array([0]),
                               sink_length=sink_length)
    assert collect(problem, 1).collected[0] == pytest.approx(expected, rel=0.05)
