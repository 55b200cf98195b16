"""Resistance of a resistive sheet from device electrodes to grounded taps.

A body (an n-well, an isolated p-well, the substrate) is a sheet of uniform sheet
resistance ``Rs`` (ohm per square) over its region. Contacted taps are grounded
electrodes; each device diffusion in turn is an equipotential electrode, and its
resistance to the taps is what this module computes.

Discretization: finite volumes on a rectilinear grid whose lines pass through every
vertex coordinate of the region, the taps and the devices, so Manhattan shapes are
represented exactly (other edges are staircased at the grid's resolution). Cells are
``fine`` beside those lines and grow geometrically to ``coarse``. A tap edge is an
exact Dirichlet boundary (the link from a free cell to a tap spans half the free
cell); a device gets a thin layer of cells on each side of its outline, and its
electrode current enters through the inner layer, so the electrode sits within a few
percent of a fine cell of the drawn edge. Cells with no path to a tap are dropped;
their devices get an infinite resistance.

Solution: the grounded-tap conductance matrix is factorized once per region
(``scipy.sparse.linalg.splu``). The equipotential condition of every device is met by
conjugate gradients on the device's outline cells, all devices together, each
iteration one solve per device on the one factorization (many right-hand sides). By
Thomson's principle every iterate is an upper bound on the resistance of the
discrete sheet, falling monotonically; a device stops when its bound moves by less
than ``CG_TOL`` (relative).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
import shapely
from scipy import ndimage
from scipy.sparse.linalg import splu
from scipy.spatial import cKDTree

GROWTH = 2.0  # largest ratio between neighbouring cell sizes
CELLS_ACROSS = 3  # adaptive grid: fine cells across the narrowest device or tap
OBLIQUE_CELLS = 32  # adaptive grid: cells across a shape with oblique or curved edges
ZONE_BAND = 4  # cells of one size around such a shape before they grow
ZONE_PASSES = 4
COARSE_FRACTION = 1 / 12  # adaptive grid: largest cell over the region's larger side
LAYER_FRACTION = 0.05  # outline layer of a device, as a fraction of the fine cell
CG_TOL = 1e-3  # relative change of a device's bound that ends its iterations
CG_MAX_ITER = 80
SOLVE_COLUMNS = 256  # right-hand sides solved per call (bounds the dense block's memory)


@dataclass(frozen=True)
class Mesh:
    """Grid lines; ``(ny, nx)`` cell arrays are indexed [row, column]."""

    x: np.ndarray  # nx + 1 increasing coordinates
    y: np.ndarray  # ny + 1

    @property
    def shape(self) -> tuple[int, int]:
        return len(self.y) - 1, len(self.x) - 1

    @property
    def cells(self) -> int:
        return (len(self.x) - 1) * (len(self.y) - 1)


@dataclass(frozen=True)
class SheetProblem:
    """One region to solve: the sheet over ``box`` covered by ``include`` and not by
    ``exclude`` (for the substrate: the wells), grounded ``taps``, device ``devices``."""

    box: tuple[float, float, float, float]
    include: np.ndarray  # polygons
    exclude: np.ndarray
    taps: np.ndarray
    devices: np.ndarray
    sheet: float  # ohm per square
    grid: float | None = None  # largest cell; None: adaptive
    # A sink per unit area (1/um^2 with sheet = 1): the steady diffusion-with-recombination
    # equation laplacian(n) = n / L^2 has reaction = 1 / L^2 (analyzers/electrical/transport.py).
    # With a reaction, cells with no path to a tap are kept: the matrix stays regular.
    reaction: float = 0.0


@dataclass
class SheetResult:
    """Resistances of a sheet problem's devices to its taps, with the size of the grid that produced them."""
    resistance: np.ndarray  # ohm per device; inf when no tap is reachable
    cells: int  # free cells in the factorized matrix
    iterations: int  # conjugate-gradient iterations of the slowest device


def graded_lines(lo: float, hi: float, fixed: np.ndarray, fine: float, coarse: float,
                 zones: np.ndarray | None = None) -> np.ndarray:
    """Increasing coordinates from lo to hi through every ``fixed`` one inside, with
    cells of ``fine`` beside each fixed line growing by GROWTH up to ``coarse``;
    within each ``zones`` row (start, end, size) no cell is larger than size."""
    fixed = np.unique(np.r_[lo, hi, fixed[(fixed > lo) & (fixed < hi)]])
    fixed = fixed[np.r_[True, np.diff(fixed) > fine * 1e-3]]
    fixed[-1] = hi
    steps = int(np.ceil(np.log(max(coarse / fine, 1.0)) / np.log(GROWTH))) + 1
    ramp_end = np.cumsum(np.minimum(fine * GROWTH ** np.arange(steps), coarse))
    # Each interval: cells growing from both ends (the ramp, then coarse ones) to its
    # middle, all scaled down together so that the two halves meet there.
    length = np.diff(fixed)
    half = length / 2
    n_ramp = np.minimum(np.searchsorted(ramp_end, half) + 1, steps)
    n_coarse = np.ceil(np.maximum(half - ramp_end[-1], 0) / coarse).astype(np.int64)
    scale = half / (ramp_end[n_ramp - 1] + n_coarse * coarse)
    split = length > fine * 1.5  # shorter intervals stay one cell
    inner = np.where(split, n_ramp + n_coarse - 1, 0)
    owner = np.repeat(np.arange(len(length)), inner)
    k = np.arange(len(owner)) - np.repeat(np.cumsum(inner) - inner, inner)
    nr = n_ramp[owner]
    run = np.where(k < nr, ramp_end[np.minimum(k, steps - 1)], ramp_end[nr - 1] + (k - nr + 1) * coarse)
    offset = scale[owner] * run
    lines = np.unique(np.r_[fixed, fixed[:-1][split] + half[split], fixed[:-1][owner] + offset,
                            fixed[1:][owner] - offset])
    if zones is None or len(zones) == 0:
        return lines
    for _ in range(ZONE_PASSES):  # a split interval's halves are capped again by their own middles
        mid = (lines[:-1] + lines[1:]) / 2
        cap = np.full(len(mid), np.inf)
        for start, end, size in zones:
            inside = (mid >= start) & (mid <= end)
            cap[inside] = np.minimum(cap[inside], size)
        pieces = np.maximum(1, np.ceil(np.diff(lines) / cap - 1e-9)).astype(np.int64)
        if (pieces == 1).all():
            break
        owner = np.repeat(np.arange(len(mid)), pieces)
        step = np.arange(len(owner)) - np.repeat(np.cumsum(pieces) - pieces, pieces)
        lines = np.r_[lines[:-1][owner] + np.diff(lines)[owner] * step / pieces[owner], hi]
    return lines


def edge_lines(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(x of every vertical edge, y of every horizontal edge) of the polygons: the grid
    lines that represent them exactly. Oblique edges add none (they are staircased)."""
    if len(geoms) == 0:
        return np.zeros(0), np.zeros(0)
    rings = shapely.get_rings(geoms)
    xy, ring = shapely.get_coordinates(rings, return_index=True)
    same = ring[1:] == ring[:-1]
    a, b = xy[:-1][same], xy[1:][same]
    return a[a[:, 0] == b[:, 0], 0], a[a[:, 1] == b[:, 1], 1]


def dimensions(geoms: np.ndarray) -> np.ndarray:
    """Narrower side of each geometry's bounding box."""
    if len(geoms) == 0:
        return np.zeros(0)
    b = shapely.bounds(geoms)
    return np.minimum(b[:, 2] - b[:, 0], b[:, 3] - b[:, 1])


def make_mesh(problem: SheetProblem, max_cell: float | None = None,
              refine: tuple[np.ndarray, float] | None = None) -> tuple[Mesh, float]:
    """The grid of a problem and its outline-layer thickness; ``max_cell`` caps the
    adaptive grid's largest cell (a diffusion length has to be resolved everywhere), and
    ``refine`` = (polygons, size) caps it over each polygon's bounding box."""
    x0, y0, x1, y1 = problem.box
    side = max(x1 - x0, y1 - y0)
    if problem.grid is not None:
        fine = coarse = problem.grid
    else:
        dims = np.r_[dimensions(problem.devices), dimensions(problem.taps)]
        dims = dims[dims > 0]
        fine = (dims.min() if len(dims) else side) / CELLS_ACROSS
        coarse = side * COARSE_FRACTION if max_cell is None else min(side * COARSE_FRACTION, max_cell)
    fine = max(min(fine, side / 4), side * 1e-5)
    coarse = max(coarse, fine)
    layer = fine * LAYER_FRACTION
    sx, sy = edge_lines(np.r_[problem.include, problem.exclude, problem.taps])
    dx, dy = edge_lines(problem.devices)
    xs = np.r_[sx, dx, dx - layer, dx + layer]
    ys = np.r_[sy, dy, dy - layer, dy + layer]
    zones_x, zones_y = _oblique_zones(problem, fine if problem.grid is not None else None, coarse)
    if refine is not None and len(refine[0]) and problem.grid is None:
        b = shapely.bounds(refine[0])
        size = np.full(len(b), max(refine[1], fine))
        extra_x, extra_y = np.c_[b[:, 0], b[:, 2], size], np.c_[b[:, 1], b[:, 3], size]
        zones_x = extra_x if zones_x is None else np.r_[zones_x, extra_x]
        zones_y = extra_y if zones_y is None else np.r_[zones_y, extra_y]
    mesh = Mesh(graded_lines(x0, x1, xs, fine, coarse, zones_x),
                graded_lines(y0, y1, ys, fine, coarse, zones_y))
    return mesh, layer


def _oblique_zones(problem: SheetProblem, grid: float | None, coarse: float):
    """Over the bounding box of each shape with oblique edges, cells of at most its
    narrower side / OBLIQUE_CELLS (or the set grid): a staircase needs them. Around it,
    nested bands let the cells grow by GROWTH every ZONE_BAND cells up to ``coarse``."""
    shapes = np.r_[problem.include, problem.exclude, problem.taps, problem.devices]
    slanted = shapes[oblique(shapes)]
    if len(slanted) == 0:
        return None, None
    b = shapely.bounds(slanted)
    size = np.full(len(b), grid) if grid is not None else dimensions(slanted) / OBLIQUE_CELLS
    zones_x, zones_y = [], []
    level, reach = size.copy(), np.zeros(len(b))
    while True:
        zones_x.append(np.c_[b[:, 0] - reach, b[:, 2] + reach, level])
        zones_y.append(np.c_[b[:, 1] - reach, b[:, 3] + reach, level])
        if (level >= coarse).all():
            break
        reach = reach + ZONE_BAND * level
        level = level * GROWTH
    return np.concatenate(zones_x), np.concatenate(zones_y)


def oblique(geoms: np.ndarray) -> np.ndarray:
    """Boolean per polygon: some edge is neither horizontal nor vertical."""
    if len(geoms) == 0:
        return np.zeros(0, bool)
    xy, ring = shapely.get_coordinates(shapely.get_rings(geoms), return_index=True)
    _, owner = shapely.get_rings(geoms, return_index=True)
    same = ring[1:] == ring[:-1]
    step = np.diff(xy, axis=0)
    slanted = same & (step[:, 0] != 0) & (step[:, 1] != 0)
    out = np.zeros(len(geoms), bool)
    out[owner[ring[:-1][slanted]]] = True
    return out


def _is_box(geoms: np.ndarray) -> np.ndarray:
    b = shapely.bounds(geoms)
    box_area = (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1])
    return np.isclose(shapely.area(geoms), box_area, rtol=1e-9, atol=0)


def paint(mesh: Mesh, geoms: np.ndarray, labels: np.ndarray | None = None) -> np.ndarray:
    """Cells whose centre lies in each geometry: a boolean union (``labels`` None) or
    an int array holding ``labels[k]`` in the cells of geoms[k] and -1 elsewhere."""
    ny, nx = mesh.shape
    out = np.full((ny, nx), -1, np.int64) if labels is not None else np.zeros((ny, nx), bool)
    if len(geoms) == 0:
        return out
    xc, yc = (mesh.x[:-1] + mesh.x[1:]) / 2, (mesh.y[:-1] + mesh.y[1:]) / 2
    bounds = shapely.bounds(geoms)
    i0, i1 = np.searchsorted(xc, bounds[:, 0]), np.searchsorted(xc, bounds[:, 2])
    j0, j1 = np.searchsorted(yc, bounds[:, 1]), np.searchsorted(yc, bounds[:, 3])
    boxes = _is_box(geoms)
    for k in range(len(geoms)):
        if i0[k] >= i1[k] or j0[k] >= j1[k]:
            continue
        value = True if labels is None else labels[k]
        if boxes[k]:
            out[j0[k]:j1[k], i0[k]:i1[k]] = value
            continue
        gx, gy = np.meshgrid(xc[i0[k]:i1[k]], yc[j0[k]:j1[k]])
        inside = shapely.contains_xy(geoms[k], gx, gy)
        out[j0[k]:j1[k], i0[k]:i1[k]][inside] = value
    return out


@dataclass
class _Network:
    matrix: sp.csc_matrix
    node: np.ndarray  # (ny, nx) node number of each kept free cell, -1 elsewhere
    tap: np.ndarray  # (ny, nx) bool
    # Every link from a free cell to a tap cell: (node, conductance, flat index of the tap
    # cell); the current into a tap is the sum of conductance * potential over its links.
    ground_node: np.ndarray
    ground_g: np.ndarray
    ground_cell: np.ndarray


def build_network(mesh: Mesh, problem: SheetProblem) -> _Network:
    """Grounded-tap conductance matrix over the free cells that reach a tap."""
    region = paint(mesh, problem.include)
    if len(problem.exclude):
        region &= ~paint(mesh, problem.exclude)
    tap = paint(mesh, problem.taps) & region
    free = region & ~tap
    # Keep the free cells connected to a tap: the others float (a singular matrix).
    beside_tap = np.zeros_like(free)
    beside_tap[:, :-1] |= tap[:, 1:]
    beside_tap[:, 1:] |= tap[:, :-1]
    beside_tap[:-1, :] |= tap[1:, :]
    beside_tap[1:, :] |= tap[:-1, :]
    if problem.reaction > 0:
        keep = free
    else:
        component, _ = ndimage.label(free)
        grounded = np.unique(component[free & beside_tap])
        keep = free & np.isin(component, grounded[grounded > 0])
    node = np.full(mesh.shape, -1, np.int64)
    n = int(keep.sum())
    node[keep] = np.arange(n)
    dx, dy, rs = np.diff(mesh.x), np.diff(mesh.y), problem.sheet
    rows, cols, vals, ground_node, ground_g, ground_cell = [], [], [], [], [], []
    cell_index = np.arange(mesh.cells).reshape(mesh.shape)
    # Neighbours along each axis: face over centre distance; to a tap, over half the free cell.
    for axis in (1, 0):
        a, b = (np.s_[:, :-1], np.s_[:, 1:]) if axis == 1 else (np.s_[:-1, :], np.s_[1:, :])
        step = dx[None, :] if axis == 1 else dy[:, None]
        face = dy[:, None] if axis == 1 else dx[None, :]
        step_a, step_b = (step[:, :-1], step[:, 1:]) if axis == 1 else (step[:-1, :], step[1:, :])
        face = np.broadcast_to(face, keep.shape)[a]
        both = keep[a] & keep[b]
        g = np.broadcast_to(face / (rs * (step_a + step_b) / 2), both.shape)
        rows.append(node[a][both]), cols.append(node[b][both]), vals.append(g[both])
        for here, there, half_step in ((a, b, step_a), (b, a, step_b)):
            touch = keep[here] & tap[there]
            ground_node.append(node[here][touch])
            ground_g.append(np.broadcast_to(face / (rs * half_step / 2), touch.shape)[touch])
            ground_cell.append(cell_index[there][touch])
    r, c, v = np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
    ground_node, ground_g = np.concatenate(ground_node), np.concatenate(ground_g)
    degree = np.bincount(r, v, n) + np.bincount(c, v, n) + np.bincount(ground_node, ground_g, n)
    if problem.reaction > 0:
        degree += (dy[:, None] * dx[None, :])[keep] * problem.reaction / rs
    diag = np.arange(n)
    matrix = sp.csc_matrix((np.r_[-v, -v, degree], (np.r_[r, c, diag], np.r_[c, r, diag])), shape=(n, n))
    return _Network(matrix, node, tap, ground_node, ground_g, np.concatenate(ground_cell))


def outlines(mesh: Mesh, network: _Network, label: np.ndarray, n_devices: int):
    """Per device: the node numbers of its cells that border the rest of the sheet, and
    the length of that border (the weight of uniform current density)."""
    dx, dy = np.diff(mesh.x), np.diff(mesh.y)
    ny, nx = label.shape
    in_sheet = (network.node >= 0) | network.tap
    weight = np.zeros((ny, nx))
    # A face between a device cell and a sheet cell outside that device.
    horiz = (label[:, :-1] != label[:, 1:])
    for a, b in ((np.s_[:, :-1], np.s_[:, 1:]), (np.s_[:, 1:], np.s_[:, :-1])):
        edge = horiz & (label[a] >= 0) & in_sheet[b]
        weight[a] += np.where(edge, np.broadcast_to(dy[:, None], edge.shape), 0.0)
    vert = (label[:-1, :] != label[1:, :])
    for a, b in ((np.s_[:-1, :], np.s_[1:, :]), (np.s_[1:, :], np.s_[:-1, :])):
        edge = vert & (label[a] >= 0) & in_sheet[b]
        weight[a] += np.where(edge, np.broadcast_to(dx[None, :], edge.shape), 0.0)
    on = (weight > 0) & (network.node >= 0)
    dev, nodes, w = label[on], network.node[on], weight[on]
    order = np.argsort(dev, kind="stable")
    dev, nodes, w = dev[order], nodes[order], w[order]
    shorted = np.zeros(n_devices, bool)  # a device cell that is a tap: no resistance at all
    shorted[np.unique(label[(label >= 0) & network.tap])] = True
    return dev, nodes, w, shorted


def solve(problem: SheetProblem) -> SheetResult:
    """Resistance (ohm) from each device of the problem to its grounded taps."""
    n_dev = len(problem.devices)
    mesh, _layer = make_mesh(problem)
    network = build_network(mesh, problem)
    label = paint(mesh, problem.devices, np.arange(n_dev))
    dev, nodes, w, shorted = outlines(mesh, network, label, n_dev)
    resistance = np.full(n_dev, np.inf)
    resistance[shorted] = 0.0
    n = network.matrix.shape[0]
    keep = ~shorted[dev]
    dev, nodes, w = dev[keep], nodes[keep], w[keep]
    if n == 0 or len(dev) == 0:
        return SheetResult(resistance, n, 0)
    lu = factorize(network.matrix)
    devices, bound, iterations = equipotential_resistance(lu, n, dev, nodes, w)
    resistance[devices] = bound
    return SheetResult(resistance, n, iterations)


def factorize(matrix: sp.csc_matrix):
    """The sparse LU factorization of a symmetric positive definite network matrix."""
    return splu(matrix, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True})


@dataclass
class PotentialField:
    """The solved potential of one device at 1 V over the grid, taps at 0 V, and where its current goes."""
    mesh: Mesh
    potential: np.ndarray  # (ny, nx) volts; nan off the sheet; 1 on the device, 0 on taps
    tap_current: np.ndarray  # per tap of the problem, the fraction of the device's current it collects
    resistance: float


def potential_field(problem: SheetProblem, device: int = 0) -> PotentialField:
    """The potential of device ``device`` held at 1 V (the others float as sheet) and the
    share of its current each tap collects: the same grid, network and equipotential
    solution as ``solve``, kept instead of reduced to a resistance."""
    mesh, _layer = make_mesh(problem)
    network = build_network(mesh, problem)
    label = paint(mesh, problem.devices[device:device + 1], np.array([0]))
    dev, nodes, w, shorted = outlines(mesh, network, label, 1)
    potential = np.full(mesh.shape, np.nan)
    potential[network.tap] = 0.0
    shares = np.zeros(len(problem.taps))
    n = network.matrix.shape[0]
    if n == 0 or len(dev) == 0 or shorted[0]:
        return PotentialField(mesh, potential, shares, 0.0 if shorted[0] else np.inf)
    lu = factorize(network.matrix)
    _, bound, _ = equipotential_resistance(lu, n, dev, nodes, w, keep_q=True)
    q = bound[1]
    current = np.zeros(n)
    np.add.at(current, nodes, w * q)  # the injected currents I = W q; their potential is ~1 V on the outline
    volts = lu.solve(current)
    potential[network.node >= 0] = volts[network.node[network.node >= 0]]
    potential[label >= 0] = np.where(network.node[label >= 0] >= 0, potential[label >= 0], 1.0)
    tap_label = paint(mesh, problem.taps, np.arange(len(problem.taps)))
    shares = _tap_currents(network, volts, tap_label, len(problem.taps))
    total = shares.sum()
    return PotentialField(mesh, potential, shares / total if total > 0 else shares, float(bound[0][0]))


def _tap_currents(network: _Network, volts: np.ndarray, tap_label: np.ndarray, n_taps: int) -> np.ndarray:
    """Current into each tap: over the network's links to tap cells, conductance times the
    free cell's potential, summed by the tap the cell belongs to."""
    tap_of = tap_label.ravel()[network.ground_cell]
    on = tap_of >= 0
    return np.bincount(tap_of[on], network.ground_g[on] * volts[network.ground_node[on]], n_taps)


def equipotential_resistance(lu, n: int, dev: np.ndarray, nodes: np.ndarray, w: np.ndarray, keep_q: bool = False):
    """Conjugate gradients on (W Z W) q = w for all devices at once, where Z maps the
    currents injected at a device's outline nodes to their potentials (one solve of
    the factorized matrix ``lu``) and W holds the outline weights. I = W q is the
    current distribution; 1 / (w . q) is its Thomson bound on the resistance.
    Returns (devices, resistance bound, iterations of the slowest); with ``keep_q`` the
    bound is the pair (bound, q), q per outline entry."""
    devices = np.unique(dev)
    seg = np.searchsorted(devices, dev)
    k = len(devices)

    def seg_sum(values):
        return np.bincount(seg, weights=values, minlength=k)

    def apply(p, live):
        out = np.zeros_like(p)
        live_devices = np.flatnonzero(live)
        for chunk in np.array_split(live_devices, -(-len(live_devices) // SOLVE_COLUMNS)):
            column = np.full(k, -1, np.int64)
            column[chunk] = np.arange(len(chunk))
            entries = np.flatnonzero(column[seg] >= 0)
            rhs = np.zeros((n, len(chunk)), order="F")
            np.add.at(rhs, (nodes[entries], column[seg[entries]]), w[entries] * p[entries])
            potential = lu.solve(rhs)
            out[entries] = w[entries] * potential[nodes[entries], column[seg[entries]]]
        return out

    q = np.zeros(len(w))
    r = w.copy()
    p = r.copy()
    rr = seg_sum(r * r)
    bound = np.full(k, np.inf)
    live = np.ones(k, bool)
    iterations = 0
    while live.any() and iterations < CG_MAX_ITER:
        iterations += 1
        ap = apply(p, live)
        pap = seg_sum(p * ap)
        step = live & (pap > 0)
        alpha = np.where(step, rr / np.where(step, pap, 1.0), 0.0)
        q += alpha[seg] * p
        r -= alpha[seg] * ap
        new_bound = 1.0 / np.maximum(seg_sum(w * q), 1e-300)
        settled = np.abs(bound - new_bound) <= CG_TOL * new_bound
        bound = np.where(live, new_bound, bound)
        rr_new = seg_sum(r * r)
        beta = np.where(rr > 0, rr_new / np.where(rr > 0, rr, 1.0), 0.0)
        p = r + beta[seg] * p
        rr = rr_new
        live &= ~settled & (pap > 0)
    return devices, (bound, q) if keep_q else bound, iterations


@dataclass
class SourceResult:
    """Potentials of a sheet carrying distributed sources, at its devices (the emitters)."""

    peak: np.ndarray  # V per device: the highest potential over its cells (0 where none is kept)
    at: np.ndarray  # (n_devices, 2) the centre of the cell where it occurs
    cells: int


def source_potentials(problem: SheetProblem, points: np.ndarray, currents: np.ndarray) -> SourceResult:
    """Currents (A) entering the sheet at ``points`` (each at the nearest cell of the sheet
    that reaches a tap) and leaving through the grounded taps: the potential of every
    device's cells, its peak and where it sits. The devices are not electrodes here: an
    emitter at its rail draws no current until it is forward-biased, so the sheet's
    potential under it is its forward bias."""
    n_dev = len(problem.devices)
    peak, at = np.zeros(n_dev), np.full((n_dev, 2), np.nan)
    mesh, _layer = make_mesh(problem)
    network = build_network(mesh, problem)
    n = network.matrix.shape[0]
    if n == 0 or len(points) == 0:
        return SourceResult(peak, at, n)
    xc, yc = (mesh.x[:-1] + mesh.x[1:]) / 2, (mesh.y[:-1] + mesh.y[1:]) / 2
    rows, cols = np.nonzero(network.node >= 0)
    _, nearest = cKDTree(np.c_[xc[cols], yc[rows]]).query(points)
    rhs = np.bincount(network.node[rows[nearest], cols[nearest]], currents, n)
    potential = factorize(network.matrix).solve(rhs)
    label = paint(mesh, problem.devices, np.arange(n_dev))
    on = (label >= 0) & (network.node >= 0)
    if not on.any():
        return SourceResult(peak, at, n)
    dev, value = label[on], potential[network.node[on]]
    jj, ii = np.nonzero(on)
    order = np.lexsort((-value, dev))
    first = order[np.r_[True, dev[order][1:] != dev[order][:-1]]]
    peak[dev[first]] = value[first]
    at[dev[first]] = np.c_[xc[ii[first]], yc[jj[first]]]
    return SourceResult(peak, at, n)
