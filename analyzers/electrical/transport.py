"""Where injected minority carriers go: steady diffusion with recombination in a sheet.

A pad diffusion driven outside the rails injects minority carriers into its body
(electrons from N+ into the p-substrate, holes from P+ into the n-well). In steady
state their density n obeys D laplacian(n) - n / tau = 0, that is laplacian(n) = n / L^2
with the diffusion length L = sqrt(D tau). Reverse- or zero-biased junctions (n-wells
and N+ regions for electrons, the substrate for holes) and ohmic taps hold n = 0: they
absorb what reaches them. Shallow diffusions (taps, N+ and P+ regions) are sinks of
finite strength instead: the sheet stands for the layer from the surface down to the
depth t of the wells, a carrier can pass under a diffusion, and one below it reaches
the diffusion at the surface at the rate of the slowest mode of a slab of thickness t
with one absorbing face, D (pi / 2t)^2 (separation of variables), so a diffusion's
cells carry an extra reaction with the sink length 2t / pi. The injector is a source of unit current spread evenly along
its outline. Every injected carrier is either collected by one of the absorbers or
recombines on the way; the fractions add up to one.

The discretization is the sheet solver's (analyzers/electrical/sheet.py): the same
graded grid, with a reaction term area / L^2 on the diagonal (``SheetProblem.reaction``)
and the absorbers as its grounded taps; the flux into an absorber is the sum of its tap
links' conductance times the density beside it. The grid's largest cell is L /
CELLS_PER_LENGTH, so the exponential decay is resolved everywhere. The model is 2-D (a
carrier cannot pass under a shallow diffusion), with a uniform L and low injection
(the equation is linear); docs/physics.md states what that leaves out.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import scipy.sparse as sp

from latchwatch.analyzers.electrical.sheet import (
    SheetProblem,
    build_network,
    factorize,
    make_mesh,
    outlines,
    paint,
)

CELLS_PER_LENGTH = 8  # the largest grid cell is L / CELLS_PER_LENGTH
CELLS_PER_SINK_LENGTH = 2  # ... and inside a sink, its sink length / CELLS_PER_SINK_LENGTH


@dataclass(frozen=True)
class TransportProblem:
    """One injector in a sheet over ``box`` covered by ``include``; ``absorbers[k]`` holds
    n = 0 and collects for collector ``label[k]`` (several polygons may share a label);
    ``sinks[k]`` take carriers at the rate of ``sink_length`` for collector ``sink_label[k]``."""

    box: tuple[float, float, float, float]
    include: np.ndarray  # polygons
    absorbers: np.ndarray  # polygons
    label: np.ndarray  # int per absorber, 0 .. n_collectors - 1
    injector: object  # a polygon
    length: float  # diffusion length, um
    sinks: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))
    sink_label: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    sink_length: float = np.inf  # um
    grid: float | None = None  # uniform cell size; None: adaptive


@dataclass
class TransportResult:
    """Fractions of the injected current: per collector, and recombined in the sheet."""

    collected: np.ndarray  # fraction per collector label
    recombined: float
    # The cells of the absorbers that take the current, with the fraction each takes: the
    # sources of the collecting body's sheet (analyzers/electrical/trigger.py).
    points: np.ndarray  # (k, 2) cell centres
    point_label: np.ndarray  # collector label of each
    point_fraction: np.ndarray
    cells: int  # free cells of the grid


def collect(problem: TransportProblem, n_collectors: int) -> TransportResult:
    """Solve one transport problem: where the injector's unit current ends up."""
    sheet = SheetProblem(problem.box, problem.include, problem.sinks, problem.absorbers,
                         np.array([problem.injector], dtype=object), 1.0, problem.grid,
                         reaction=1.0 / problem.length ** 2)
    # Cells of at most half the sink length inside sinks: the density decays there.
    mesh, _layer = make_mesh(sheet, max_cell=problem.length / CELLS_PER_LENGTH,
                             refine=(problem.sinks, problem.sink_length / CELLS_PER_SINK_LENGTH))
    # The sinks only place grid lines (as ``exclude``); the network is built without them.
    network = build_network(mesh, replace(sheet, exclude=np.empty(0, dtype=object)))
    area_grid = np.diff(mesh.y)[:, None] * np.diff(mesh.x)[None, :]
    sink_label = paint(mesh, problem.sinks, problem.sink_label)
    in_sink = (sink_label >= 0) & (network.node >= 0)
    sink_rate = area_grid[in_sink] / problem.sink_length ** 2
    matrix = network.matrix
    if in_sink.any():
        n_free = matrix.shape[0]
        matrix = (matrix + sp.csc_matrix((sink_rate, (network.node[in_sink], network.node[in_sink])),
                                         shape=(n_free, n_free))).tocsc()
    collected = np.zeros(n_collectors)
    empty = TransportResult(collected, 0.0, np.zeros((0, 2)), np.zeros(0, np.int64), np.zeros(0), 0)
    absorber_label = paint(mesh, problem.absorbers, problem.label)
    injector_label = paint(mesh, sheet.devices, np.zeros(1, np.int64))
    dev, nodes, w, shorted = outlines(mesh, network, injector_label, 1)
    xc, yc = (mesh.x[:-1] + mesh.x[1:]) / 2, (mesh.y[:-1] + mesh.y[1:]) / 2
    n = network.matrix.shape[0]
    if shorted[0] or n == 0 or len(nodes) == 0:
        # The injector overlaps an absorber (or has no free cell beside it): that absorber
        # takes everything, at the injector's own cells.
        under = (injector_label >= 0) & (absorber_label >= 0)
        if not under.any():
            return empty
        rows, cols = np.nonzero(under)
        labels = absorber_label[under]
        share = np.full(len(labels), 1.0 / len(labels))
        collected[:] = np.bincount(labels, share, n_collectors)
        return TransportResult(collected, 0.0, np.c_[xc[cols], yc[rows]], labels, share, n)
    source = np.bincount(nodes, w / w.sum(), n)
    density = factorize(matrix).solve(source)
    flux = network.ground_g * density[network.ground_node]
    cell, into = np.unique(network.ground_cell, return_inverse=True)
    per_cell = np.bincount(into.ravel(), flux, len(cell))
    labels = absorber_label.ravel()[cell]
    collected[:] = np.bincount(labels, per_cell, n_collectors)
    collected += np.bincount(sink_label[in_sink], sink_rate * density[network.node[in_sink]], n_collectors)
    area = area_grid[network.node >= 0]
    recombined = float(sheet.reaction * (area * density[network.node[network.node >= 0]]).sum())
    rows, cols = np.divmod(cell, mesh.shape[1])
    return TransportResult(collected, recombined, np.c_[xc[cols], yc[rows]], labels, per_cell, n)
