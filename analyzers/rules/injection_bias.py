"""injection-bias: the current injected at a pad-connected diffusion, carried by minority
carriers to a collecting body, forward-biases an emitter of the opposite type there
(analyzers/electrical/trigger.py). It replaces shunt-resistance's check of pad-connected
devices: that one compared a whole injection with one shunt and failed every layout."""

from __future__ import annotations

import shapely

from latchwatch.analyzers.electrical.shunt import si
from latchwatch.analyzers.electrical.trigger import injections
from latchwatch.analyzers.extraction.devices import DEVICE_KIND
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc
from latchwatch.analyzers.rules.tap_distance import describe

EVENT = {"electrons": "electrons injected when the pad falls below ground",
         "holes": "holes injected when the pad rises above the supply"}
EMITTER = {"electrons": "P+ diffusion", "holes": "N+ diffusion"}
# The model is linear: past vbe_on the junction conducts and clamps, so a bias far above
# it says "turns on", not that voltage; the message says so.
MESSAGE = ("{what}: of {current} {event}, {collected} ({fraction}) reaches the {collector} {body} and "
           "forward-biases the {emitter} at ({x:.2f}, {y:.2f}) by {bias} in a linear model, past "
           "vbe_on {vbe} at {temperature:g} C, so it turns on (diffusion and sheet model)")


def check(ctx):
    """A finding per pad-connected diffusion whose injection forward-biases an opposite-type emitter."""
    ex = ctx.extraction
    for kind, found in injections(ctx).items():
        pieces = ex.ndiff if kind == "n" else ex.pdiff
        gated = ex.ndiff_gated if kind == "n" else ex.pdiff_gated
        emitters = ex.pdiff if kind == "n" else ex.ndiff
        for i, inj in sorted(found.items()):
            if not inj.triggers:
                continue
            worst = max((c for c in inj.collected if c.bias_v is not None), key=lambda c: c.bias_v)
            message = MESSAGE.format(
                what=describe(kind, bool(gated[i])), current=si(inj.current_a, "A"), event=EVENT[inj.carriers],
                collected=si(worst.current_a, "A"), fraction=f"{worst.fraction:.3g}", collector=worst.kind,
                body=worst.body, bias=si(inj.worst_bias_v, "V"), emitter=EMITTER[inj.carriers],
                x=inj.worst_at[0], y=inj.worst_at[1], vbe=si(inj.vbe_on_v, "V"), temperature=inj.temperature_c)
            related = (ctx.related_shape(int(emitters.shape[inj.worst_emitter]),
                                         f"forward-biased {EMITTER[inj.carriers]}", location=inj.worst_at),)
            yield ctx.piece_finding(
                RULE, pieces, i, message,
                location=shapely.get_coordinates(shapely.point_on_surface(pieces.geoms[i]))[0],
                bbox=shapely.bounds(pieces.geoms[i]), value=inj.worst_bias_v,
                limit=float(f"{inj.vbe_on_v:.6g}"), unit="V", related=related,
                figures={"injection": inj.record(), "basis": "estimate from a diffusion and sheet model"},
                device_kind=DEVICE_KIND[kind],
            )


RULE = Rule(
    id="injection-bias",
    severity=Severity.WARNING,
    summary=("Current injected at a pad-connected diffusion, collected by a well or the substrate, "
             "forward-biases an emitter of the opposite type there."),
    doc=RuleDoc(
        flags=(
            "Every pad-connected N+ diffusion in the substrate and P+ diffusion in an n-well (a [nets] pads "
            "name on a terminal, or the io_marker layer) is an injector of [electrical] injection_current "
            "(default 0.1 A, the JEDEC JESD78 I-test level) in the polarity that forward-biases it: electrons "
            "into the substrate when the pad falls below ground, holes into the n-well when it rises above "
            "the supply. The rule fires where the forward bias the collected current builds under an emitter "
            "of the opposite type exceeds vbe_on at [electrical] temperature. The message gives the current, "
            "the fraction that reaches the collecting body and the bias; --devices and the hover give every "
            "collector's share and the loop-gain figure.\n\n"
            "Model. (1) Transport: steady diffusion with recombination, D laplacian(n) = n / tau, in a 2-D "
            "sheet, in a window 3 diffusion lengths around the injector (its edges reflect). n-wells and deep "
            "n-wells absorb electrons at their edge (the substrate absorbs holes at the well's edge); shallow "
            "diffusions (taps, other N+ or P+ regions) are sinks of finite strength, because a carrier can "
            "pass under them: their sink length is 2t / pi for the sheet depth t (nwell_depth, else 2 um). "
            "Diffusion lengths: electron_diffusion_length, hole_diffusion_length (um), else from "
            "electron_lifetime / hole_lifetime and the doping, else 100 um and 30 um (a judgement inside "
            "published ranges; analyzers/electrical/carriers.py gives the sources). (2) Bias: the current a "
            "body collects enters its sheet where it was collected and flows to the body's contacted taps "
            "(the sheet solver of shunt-resistance, with distributed sources); the sheet's potential under an "
            "emitter is its forward bias. (3) Temperature: vbe_on falls 2 mV/K, sheets rise as the GF180MCU "
            "n-well resistor does, minority mobility falls as T^-2.3.\n\n"
            "Limits. The model is 2-D: a carrier cannot pass under a well, and holes collected through the "
            "bottom of the n-well (the vertical PNP) are not modelled, so the substrate current of a P+ "
            "injector is a lower bound. Sheets are uniform; injection is low (the equations are linear, so a "
            "bias far above vbe_on only says that the emitter turns on, not by how much); an epitaxial wafer "
            "needs a far shorter electron length. N+ injectors in an isolated p-well are not analysed. The "
            "loop-gain figure is information only, with its assumptions stated beside it. Shallow "
            "diffusions as finite sinks and the 2 um default depth are this model's choices, not measured "
            "behaviour: a figure near vbe_on is a prompt to look, not a verdict."
        ),
        why=(
            "A pad driven outside the rails forward-biases its own diffusion, which injects minority carriers "
            "into its body. They diffuse and recombine, and the junctions and taps around collect them. "
            "Current collected by an n-well flows to the well's taps and lowers the well under its P+ "
            "diffusions; current collected by the substrate raises it under its N+ diffusions. Once that "
            "reaches the junction turn-on voltage the parasitic bipolar conducts, and with its partner in the "
            "PNPN stack it can regenerate into a supply-to-ground short. Guard rings work by collecting the "
            "carriers close to the injector, before they reach a body with emitters in it; the fraction that "
            "gets past them is set by the layout, and no distance rule computes it."
        ),
        example=(
            "box(cell, NPLUS, 0, 0, 10, 4)\n"
            "box(cell, ACTIVE, 0, 0, 10, 4)            # pad-connected N+ diffusion, no guard ring\n"
            "box(cell, IO_MARKER, 0, 0, 10, 4)\n"
            "box(cell, NWELL, 0, 10, 10, 30)           # a core n-well 6 um away\n"
            "box(cell, PPLUS, 2, 12, 8, 14)\n"
            "box(cell, ACTIVE, 2, 12, 8, 14)           # its P+ diffusion, 14 um from the well's tap"
        ),
        fix=(
            "Surround the injector with a double ring: a contacted majority-carrier ring (a P+ tap ring around "
            "an N+ injector) and, outside it, a minority-carrier ring that collects (an n-well ring with a "
            "contacted N+ tap around an N+ injector; a P+ tap ring outside the n-well of a P+ injector), "
            "closed, and tied to the supply. Keep core wells and diffusions far away (several diffusion "
            "lengths), and tap the core wells densely so that collected current finds a tap near where it "
            "arrives."
        ),
    ),
    check=check,
)
