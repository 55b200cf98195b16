"""The trigger analysis: where a pad's injected current goes, and the bias it builds.

Injectors are the pad-connected device diffusions (a ``[nets] pads`` name on a
terminal, or the ``io_marker`` layer; analyzers/extraction/nets.py). Each injects
``injection_current`` in the polarity that forward-biases it: an N+ diffusion in the
substrate injects electrons when its pad undershoots, a P+ diffusion in an n-well
injects holes when its pad overshoots. (N+ in an isolated p-well is not analysed.)

1. Transport (analyzers/electrical/transport.py) in a window around the injector,
   clipped to the body: electrons in the
   substrate are absorbed by every n-well (an "n-well" when it holds a P+ device
   diffusion, an "n-tap ring" when it holds none), deep n-well, other N+ diffusion,
   and contacted p-tap ("p-tap", a recombination sink); holes in the n-well by its
   contacted n-taps, its other P+ diffusions and its edge (the substrate collects).
   For electrons the window first reaches FIRST_REACH_LENGTHS diffusion lengths, with
   edges that absorb; while more than ESCAPE_LIMIT of the current reaches them ("beyond
   the window") it grows 3x, and the last, REACH_LENGTHS wide, has reflecting edges
   (what would have crossed is counted on the collectors inside it). Holes stay in
   their well, which is solved whole with the substrate band at its edge.
2. Bias (analyzers/electrical/sheet.py, source_potentials): the current an n-well
   collects enters that well's sheet at the cells that collected it and flows to the
   well's contacted n-taps; the current the substrate collects at a well's edge enters
   the substrate sheet there and flows to the contacted p-taps. The sheet's potential
   under each emitter of the opposite type (the P+ diffusions of that well, the N+
   diffusions of the substrate) is the forward bias of its parasitic bipolar.
3. Loop gain of the worst pair (loop_gain): lateral gains from base width and
   diffusion length, and the regeneration condition of the two-transistor model with
   the estimated shunts (analyzers/electrical/shunt.py).

Sheets, lengths and vbe_on are taken at ``[electrical] temperature``
(analyzers/electrical/carriers.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import shapely

from latchwatch.analyzers.electrical import carriers
from latchwatch.analyzers.electrical.sheet import SheetProblem, source_potentials
from latchwatch.analyzers.electrical.shunt import (
    WINDOW_REACH,
    WINDOW_RETRIES,
    shunt_estimates,
    si,
    substrate_box,
    tap_reach,
)
from latchwatch.analyzers.electrical.transport import TransportProblem, collect
from latchwatch.analyzers.extraction.extract import SUBSTRATE, Pieces
from latchwatch.analyzers.extraction.nets import pad_connected

REACH_LENGTHS = 3.0  # window half-width beyond the injector, in diffusion lengths (exp(-3) = 5 %)
FIRST_REACH_LENGTHS = 0.5  # the first window's; each next one is 3x wider, up to REACH_LENGTHS
ESCAPE_LIMIT = 1e-4  # share of the injection that may leave a window (10 uA of 100 mA: 70 kohm to 0.7 V)
EDGE_BAND = 0.5  # um of substrate kept around an injecting well: the absorber at its edge
BIAS_DROPPED = 1e-3  # share of a body's collected current left out of its bias window (the far tail)
MIN_BIAS_CURRENT = 1e-6  # A: a body collecting less is not solved (it would need 700 kohm to reach 0.7 V)
EMPTY = np.empty(0, dtype=object)
LOOP_ASSUMPTIONS = (
    "lateral bipolars with uniform base doping and unit emitter efficiency: beta = 1 / (cosh(W / L) - 1), "
    "W the spacing (NPN: N+ emitter to the n-well; PNP: P+ emitter to its well's edge), L the diffusion "
    "length (an upper bound: 2-D spreading and the taps lower it); shunts R_W, R_S from the sheet estimate; "
    "I_DD = the injection current; regeneration when beta_n beta_p > 1 + (beta_n + 1)(I_RS + beta_p I_RW) "
    "/ (I_DD - I_RS), I_RW = V_BE / R_W, I_RS = V_BE / R_S, V_BE = vbe_on")


@dataclass(frozen=True)
class Collector:
    """One collector's share of an injection."""

    # electrons: "n-well", "n-tap ring", "deep n-well", "n+ diffusion", "p-tap";
    # holes: "n-tap", "p+ diffusion", "substrate"; both: "recombination"
    kind: str
    body: str | None  # nwell#k or psub where one body takes it
    fraction: float
    current_a: float
    bias_v: float | None = None  # the worst forward bias it builds under an emitter


@dataclass(frozen=True)
class Loop:
    """The two-transistor regeneration condition of an injector's worst pair."""

    beta_npn: float
    beta_pnp: float
    base_npn_um: float
    base_pnp_um: float
    shunt_well_ohm: float | None  # R_W
    shunt_substrate_ohm: float | None  # R_S
    gain_product: float
    required_product: float  # inf: the shunt carries the whole current
    regenerates: bool


@dataclass(frozen=True)
class Injection:
    """What one injector's current does."""

    kind: str  # "n" (N+, electrons) or "p" (P+, holes)
    piece: int
    carriers: str
    current_a: float
    collected: tuple[Collector, ...]
    worst_bias_v: float  # 0 when no emitter sees any
    worst_at: tuple[float, float] | None
    worst_emitter: int | None  # piece index of the emitter (pdiff for electrons, ndiff for holes)
    vbe_on_v: float  # at the temperature
    temperature_c: float
    diffusion_length_um: float
    loop: Loop | None

    @property
    def triggers(self) -> bool:
        return self.worst_bias_v > self.vbe_on_v

    def record(self) -> dict:
        """The devices row's ``injection`` object (docs/report-json.md): plain JSON values."""
        def collector(c: Collector) -> dict:
            row = {"kind": c.kind, "fraction": _fig(c.fraction), "current_a": _fig(c.current_a)}
            if c.body is not None:
                row["body"] = c.body
            if c.bias_v is not None:
                row["bias_v"] = _fig(c.bias_v)
            return row

        out = {"current_a": _fig(self.current_a), "carriers": self.carriers,
               "collected": [collector(c) for c in self.collected], "worst_bias_v": _fig(self.worst_bias_v),
               "worst_at": None if self.worst_at is None else [round(v, 6) for v in self.worst_at],
               "vbe_on_v": _fig(self.vbe_on_v), "temperature_c": self.temperature_c,
               "diffusion_length_um": _fig(self.diffusion_length_um), "loop": None}
        if self.loop is not None:
            lp = self.loop
            out["loop"] = {"beta_npn": _fig(lp.beta_npn), "beta_pnp": _fig(lp.beta_pnp),
                           "base_npn_um": _fig(lp.base_npn_um), "base_pnp_um": _fig(lp.base_pnp_um),
                           "shunt_well_ohm": None if lp.shunt_well_ohm is None else _fig(lp.shunt_well_ohm),
                           "shunt_substrate_ohm": (None if lp.shunt_substrate_ohm is None
                                                   else _fig(lp.shunt_substrate_ohm)),
                           "gain_product": _fig(lp.gain_product),
                           "required_product": None if not np.isfinite(lp.required_product)
                           else _fig(lp.required_product),
                           "regenerates": lp.regenerates, "assumptions": LOOP_ASSUMPTIONS}
        return out


def injections(ctx) -> dict[str, dict[int, Injection]]:
    """Per kind, piece index -> Injection for every pad-connected device diffusion; once per context."""
    return ctx.memo("injection", lambda: _analyse(ctx))


def _analyse(ctx) -> dict[str, dict[int, Injection]]:
    ex = ctx.extraction
    pads = pad_connected(ctx)
    out: dict[str, dict[int, Injection]] = {"n": {}, "p": {}}
    n_inj = np.flatnonzero(pads["n"] & (ex.ndiff.body == SUBSTRATE)) if len(ex.ndiff) else []
    p_inj = np.flatnonzero(pads["p"]) if len(ex.pdiff) else []
    if len(n_inj) == 0 and len(p_inj) == 0:
        return out
    scene = _Scene(ctx)
    for i in np.asarray(n_inj).tolist():
        out["n"][i] = scene.electrons(i)
    for i in np.asarray(p_inj).tolist():
        out["p"][i] = scene.holes(i)
    return out


def _clip(geoms: np.ndarray, box) -> np.ndarray:
    if len(geoms) == 0:
        return EMPTY
    parts = shapely.clip_by_rect(geoms, *box)
    return parts[~shapely.is_empty(parts)]


def _window_edges(box, limit, width: float) -> np.ndarray:
    """Thin strips along the sides of ``box`` that lie inside ``limit`` (the body's own
    edges reflect; a window's edges, cut through the body, absorb)."""
    x0, y0, x1, y1 = box
    strips = [(x0, y0, x0 + width, y1) if x0 > limit[0] else None, (x1 - width, y0, x1, y1) if x1 < limit[2] else None,
              (x0, y0, x1, y0 + width) if y0 > limit[1] else None, (x0, y1 - width, x1, y1) if y1 < limit[3] else None]
    return np.array([shapely.box(*s) for s in strips if s is not None], dtype=object)


def _grouped(groups, box) -> tuple[np.ndarray, np.ndarray]:
    """The (geometries, label) groups clipped to ``box``: one polygon array and its labels."""
    parts = [_clip(geoms, box) for geoms, _ in groups]
    labels = [np.full(len(p), label, np.int64) for p, (_, label) in zip(parts, groups, strict=True)]
    return np.concatenate(parts).astype(object), np.concatenate(labels)


def _in_box(tree: shapely.STRtree, box) -> np.ndarray:
    return np.sort(tree.query(shapely.box(*box), predicate="intersects"))


@dataclass(frozen=True)
class _Body:
    """A collecting body for the bias solve: its sheet, taps and emitters (``index``: their pieces)."""

    include: np.ndarray
    exclude: np.ndarray
    taps: np.ndarray
    emitters: np.ndarray
    index: np.ndarray
    limit: tuple[float, float, float, float]
    sheet: float


class _Scene:
    """The extraction's bodies, taps and emitters, indexed once for every injector."""

    def __init__(self, ctx):
        self.ctx, ex, elec = ctx, ctx.extraction, ctx.tech.electrical
        self.ex, self.elec = ex, elec
        self.current = float(elec.injection_current)
        self.vbe = carriers.vbe_on_at(elec)
        factor = carriers.sheet_factor(elec)
        nwell, psub = elec.sheet("nwell"), elec.sheet("psub")
        self.nwell_sheet = None if nwell is None else nwell * factor
        self.psub_sheet = None if psub is None else psub * factor
        self.wells = shapely.simplify(ex.wells, 0.0) if len(ex.wells) else EMPTY
        self.well_tree = shapely.STRtree(self.wells)
        self.box = substrate_box(ex)
        sub_n = ex.ndiff.body == SUBSTRATE
        self.sub_ndiff = np.flatnonzero(sub_n)
        self.ndiff_tree = shapely.STRtree(ex.ndiff.geoms[self.sub_ndiff])
        ptap = ex.ptap_contacted & (ex.ptap.body == SUBSTRATE)
        self.ptaps = ex.ptap.geoms[ptap]
        self.ptap_tree = shapely.STRtree(self.ptaps)
        self.ntap_ok = ex.ntap_contacted
        self.cut = np.concatenate([self.wells, ex.deep_nwells, ex.pwells]).astype(object)
        self.well_has_pdiff = np.zeros(len(self.wells), bool)
        self.well_has_pdiff[np.unique(ex.pdiff.body)] = True

    def window(self, geom, length: float, limit, lengths: float = REACH_LENGTHS) -> tuple[float, float, float, float]:
        b = shapely.bounds(geom)
        r = lengths * length
        return (max(b[0] - r, limit[0]), max(b[1] - r, limit[1]), min(b[2] + r, limit[2]), min(b[3] + r, limit[3]))

    # --- electrons from N+ into the substrate ------------------------------------------

    def electrons(self, i: int) -> Injection:
        ex, elec = self.ex, self.elec
        length = carriers.diffusion_length(elec, "electrons")
        injector = ex.ndiff.geoms[i]
        # Growing windows: edges that absorb (a carrier that reaches one is counted as having
        # left), until less than ESCAPE_LIMIT leaves; the last, REACH_LENGTHS wide, reflects.
        lengths = FIRST_REACH_LENGTHS
        while True:
            final = lengths >= REACH_LENGTHS
            box = self.window(injector, length, self.box, min(lengths, REACH_LENGTHS))
            wells = _in_box(self.well_tree, box)
            others = self.sub_ndiff[_in_box(self.ndiff_tree, box)]
            others = others[others != i]
            ptaps = _in_box(self.ptap_tree, box)
            # Labels: 0 p-taps, 1 N+ diffusions (sinks); 2 deep n-wells, 3 the window's edge,
            # 4 + k the k-th well in the window.
            sinks, sink_label = _grouped([(self.ptaps[ptaps], 0), (ex.ndiff.geoms[others], 1)], box)
            edges = EMPTY if final else _window_edges(box, self.box, length / 64)
            absorbers, labels = _grouped([(ex.deep_nwells, 2), (edges, 3)]
                                         + [(self.wells[[w]], 4 + k) for k, w in enumerate(wells.tolist())], box)
            problem = TransportProblem(box, np.array([shapely.box(*box)], dtype=object), absorbers, labels,
                                       injector, length, sinks, sink_label, carriers.sink_length(elec))
            result = collect(problem, 4 + len(wells))
            if final or result.collected[3] < ESCAPE_LIMIT:
                break
            lengths *= 3.0
        entries = [("p-tap", "psub", 0, None), ("n+ diffusion", "psub", 1, None), ("deep n-well", None, 2, None),
                   ("beyond the window", None, 3, None)]
        worst = (0.0, None, None, None)  # bias, at, emitter, well
        for k, w in enumerate(wells.tolist()):
            label = 4 + k
            bias = None
            if self.well_has_pdiff[w] and result.collected[label] > 0:
                take = result.point_label == label
                peak, at, emitter = self._bias_in_well(w, result.points[take],
                                                       result.point_fraction[take] * self.current)
                bias = peak
                if peak is not None and peak > worst[0]:
                    worst = (peak, at, emitter, w)
            kind = "n-well" if self.well_has_pdiff[w] else "n-tap ring"
            entries.append((kind, f"nwell#{w + 1}", label, bias))
        collected = self._entries(entries, result)
        loop = None
        if worst[2] is not None:
            well = self.wells[worst[3]]
            loop = self._loop(base_npn=float(shapely.distance(injector, well)),
                              base_pnp=float(shapely.distance(ex.pdiff.geoms[worst[2]], shapely.boundary(well))),
                              npn=i, pnp=worst[2])
        return Injection("n", i, "electrons", self.current, collected, worst[0], worst[1], worst[2], self.vbe,
                         elec.temperature, length, loop)

    def _bias_in_well(self, w: int, points, currents):
        ex = self.ex
        if self.nwell_sheet is None:
            return None, None, None
        taps = ex.ntap.geoms[(ex.ntap.body == w) & self.ntap_ok]
        emitters = np.flatnonzero(ex.pdiff.body == w)
        body = _Body(self.wells[[w]], EMPTY, taps, ex.pdiff.geoms[emitters], emitters,
                     tuple(shapely.bounds(self.wells[w]).tolist()), self.nwell_sheet)
        return self._windowed_bias(body, points, currents)

    def _windowed_bias(self, body: _Body, points, currents):
        """The worst emitter bias of ``body`` carrying ``currents`` at ``points``, solved in a
        window around the points that carry all but BIAS_DROPPED of the current, reaching
        WINDOW_REACH times the distance to the second-nearest tap (tap_reach, as the shunt
        estimate's windows; cutting sheet away raises the bias at the sources, Rayleigh's
        monotonicity). Below MIN_BIAS_CURRENT nothing is solved."""
        if len(body.taps) == 0 or len(body.emitters) == 0 or currents.sum() < MIN_BIAS_CURRENT:
            return None, None, None
        order = np.argsort(-currents)
        kept = order[:int(np.searchsorted(np.cumsum(currents[order]), (1 - BIAS_DROPPED) * currents.sum())) + 1]
        points, currents = points[kept], currents[kept]
        lo, hi = points.min(axis=0), points.max(axis=0)
        spot = Pieces(np.array([shapely.box(*lo, *hi)], dtype=object), np.zeros(1, np.int64), np.zeros(1, np.int64))
        taps = Pieces(body.taps, np.zeros(len(body.taps), np.int64), np.zeros(len(body.taps), np.int64))
        reach = WINDOW_REACH * float(tap_reach(spot, taps)[0])
        emitter_tree = shapely.STRtree(body.emitters)
        for attempt in range(WINDOW_RETRIES + 1):
            r = reach * 4.0 ** attempt
            box = (max(lo[0] - r, body.limit[0]), max(lo[1] - r, body.limit[1]),
                   min(hi[0] + r, body.limit[2]), min(hi[1] + r, body.limit[3]))
            window_taps = _clip(body.taps, box)
            if len(window_taps) or attempt == WINDOW_RETRIES:
                break
        inside = _in_box(emitter_tree, box)
        parts = shapely.clip_by_rect(body.emitters[inside], *box) if len(inside) else EMPTY
        keep = ~shapely.is_empty(parts)
        inside, parts = inside[keep], parts[keep]
        if len(inside) == 0 or len(window_taps) == 0:
            return None, None, None
        problem = SheetProblem(box, _clip(body.include, box), _clip(body.exclude, box), window_taps, parts,
                               body.sheet, self.elec.sheet_grid)
        return _worst(source_potentials(problem, points, currents), body.index[inside])

    # --- holes from P+ into its n-well -------------------------------------------------

    def holes(self, j: int) -> Injection:
        ex, elec = self.ex, self.elec
        length = carriers.diffusion_length(elec, "holes")
        injector = ex.pdiff.geoms[j]
        w = int(ex.pdiff.body[j])
        well = self.wells[w]
        grown = shapely.buffer(well, EDGE_BAND, join_style="mitre")
        box = self.window(injector, length, shapely.bounds(grown))
        region = _clip(np.array([grown], dtype=object), box)
        edge = _clip(np.array([shapely.difference(grown, well)], dtype=object), box)
        taps = ex.ntap.geoms[(ex.ntap.body == w) & self.ntap_ok]
        others = np.flatnonzero(ex.pdiff.body == w)
        others = others[others != j]
        # Labels: 0 n-taps, 1 other P+ diffusions (sinks), 2 the substrate at the well's edge.
        sinks, sink_label = _grouped([(taps, 0), (ex.pdiff.geoms[others], 1)], box)
        absorbers, labels = _grouped([(edge, 2)], box)
        problem = TransportProblem(box, region, absorbers, labels, injector, length, sinks, sink_label,
                                   carriers.sink_length(elec))
        result = collect(problem, 3)
        bias, at, emitter = None, None, None
        if result.collected[2] > 0:
            take = result.point_label == 2
            bias, at, emitter = self._bias_in_substrate(injector, result.points[take],
                                                        result.point_fraction[take] * self.current)
        collected = self._entries([("n-tap", f"nwell#{w + 1}", 0, None), ("p+ diffusion", f"nwell#{w + 1}", 1, None),
                                   ("substrate", "psub", 2, bias)], result)
        loop = None
        if emitter is not None:
            loop = self._loop(base_npn=float(shapely.distance(ex.ndiff.geoms[emitter], well)),
                              base_pnp=float(shapely.distance(injector, shapely.boundary(well))),
                              npn=emitter, pnp=j)
        return Injection("p", j, "holes", self.current, collected, bias or 0.0, at, emitter, self.vbe,
                         elec.temperature, length, loop)

    def _bias_in_substrate(self, injector, points, currents):
        if self.psub_sheet is None:
            return None, None, None
        body = _Body(np.array([shapely.box(*self.box)], dtype=object), self.cut, self.ptaps,
                     self.ex.ndiff.geoms[self.sub_ndiff], self.sub_ndiff, self.box, self.psub_sheet)
        return self._windowed_bias(body, points, currents)

    # --- figures -----------------------------------------------------------------------

    def _entries(self, entries, result) -> tuple[Collector, ...]:
        out = [Collector(kind, body, float(result.collected[label]), float(result.collected[label]) * self.current,
                         bias) for kind, body, label, bias in entries if result.collected[label] > 0]
        out.sort(key=lambda c: -c.fraction)
        out.append(Collector("recombination", None, result.recombined, result.recombined * self.current))
        return tuple(out)

    def _loop(self, base_npn: float, base_pnp: float, npn: int, pnp: int) -> Loop:
        shunts = shunt_estimates(self.ctx)
        # The shunt estimate is at the technology's sheets; the loop is at its temperature.
        factor = carriers.sheet_factor(self.elec)
        r_w, r_s = _known(shunts["p"].ohm[pnp] * factor), _known(shunts["n"].ohm[npn] * factor)
        beta_n = lateral_beta(base_npn, carriers.diffusion_length(self.elec, "electrons"))
        beta_p = lateral_beta(base_pnp, carriers.diffusion_length(self.elec, "holes"))
        required = regeneration_threshold(beta_n, beta_p, self.vbe, r_w, r_s, self.current)
        return Loop(beta_n, beta_p, base_npn, base_pnp, r_w, r_s, beta_n * beta_p, required,
                    bool(beta_n * beta_p > required))


def _worst(res, emitters):
    """(peak bias, where, emitter piece) of the most biased emitter; no emitter when none is biased."""
    k = int(np.argmax(res.peak))
    if res.peak[k] <= 0:
        return 0.0, None, None
    return float(res.peak[k]), tuple(res.at[k].tolist()), int(emitters[k])


def _fig(value: float) -> float:
    return float(f"{value:.6g}")


def _known(ohm: float) -> float | None:
    return float(ohm) if np.isfinite(ohm) else None


def lateral_beta(base_um: float, length_um: float) -> float:
    """Common-emitter gain of a bipolar with base width W and diffusion length L, with unit
    emitter efficiency: the base transport factor is sech(W / L) (Neamen, Semiconductor
    Physics and Devices, eq. 12.39a), so beta = alpha / (1 - alpha) = 1 / (cosh(W / L) - 1)."""
    x = max(base_um, 1e-9) / length_um
    return float(1.0 / np.expm1(np.logaddexp(x, -x) - np.log(2.0))) if x < 700 else 0.0


def regeneration_threshold(beta_n: float, beta_p: float, vbe: float, r_well: float | None,
                           r_sub: float | None, supply_current: float) -> float:
    """The gain product beta_n beta_p must exceed for the pair to regenerate, with shunts:
    1 + (beta_n + 1)(I_RS + beta_p I_RW) / (I_DD - I_RS), I_RW = V_BE / R_W, I_RS = V_BE / R_S
    (docs/physics.md). An unknown or open shunt carries no current; inf when I_RS >= I_DD."""
    i_rw = vbe / r_well if r_well else 0.0
    i_rs = vbe / r_sub if r_sub else 0.0
    if i_rs >= supply_current:
        return float("inf")
    return 1.0 + (beta_n + 1.0) * (i_rs + beta_p * i_rw) / (supply_current - i_rs)


def describe_injection(record: dict) -> str:
    """One line of an ``injection`` record for the --devices table and the hover."""
    shares = []
    for c in record["collected"]:
        name = c["kind"] + (f" {c['body']}" if "body" in c and c["kind"] not in ("p-tap", "recombination") else "")
        bias = f" ({si(c['bias_v'], 'V')} bias)" if "bias_v" in c else ""
        shares.append(f"{name} {c['fraction']:.3g}{bias}")
    text = (f"injection {si(record['current_a'], 'A')} {record['carriers']}: " + ", ".join(shares)
            + f"; worst bias {si(record['worst_bias_v'], 'V')}")
    if record["worst_at"] is not None:
        text += f" at ({record['worst_at'][0]:.2f}, {record['worst_at'][1]:.2f})"
    text += f" (vbe_on {si(record['vbe_on_v'], 'V')} at {record['temperature_c']:g} C)"
    loop = record.get("loop")
    if loop:
        needed = "no regeneration" if loop["required_product"] is None else f"{loop['required_product']:.3g} needed"
        text += (f"; loop gain beta_npn {loop['beta_npn']:.3g} x beta_pnp {loop['beta_pnp']:.3g} = "
                 f"{loop['gain_product']:.3g} ({needed}; upper bound, information)")
    return text
