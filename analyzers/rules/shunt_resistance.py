"""shunt-resistance: the estimated well or substrate resistance from a core device to its
taps is so high that less than core_current forward-biases its junction (the estimate is
analyzers/electrical/shunt.py on the sheet model of analyzers/electrical/sheet.py)."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.electrical.shunt import nearest_taps, shunt_estimates, si
from latchwatch.analyzers.extraction.devices import DEVICE_KIND, KINDS
from latchwatch.analyzers.extraction.extract import SUBSTRATE
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc
from latchwatch.analyzers.rules.tap_distance import describe

BODY = {"p": ("n-well", "n-well tap"), "n": ("substrate", "substrate tap"), "pwell": ("p-well", "p-well tap")}
MESSAGE = ("{what}: estimated {body} resistance to its taps {ohm} (sheet model), so {trigger} through it "
           "forward-biases the junction, below the {required} a {role} device must withstand")
MESSAGE_NO_PATH = ("{what}: no path through the {body} sheet to a contacted {tap} (sheet model with wells "
                   "cut out), so any current forward-biases the junction; a {role} device must withstand {required}")


def check(ctx):
    """Findings for devices whose estimated shunt lets less than the required current forward-bias the junction."""
    ex = ctx.extraction
    estimates = shunt_estimates(ctx)
    for kind in KINDS:
        est = estimates[kind]
        pieces = ex.pdiff if kind == "p" else ex.ndiff
        gated = ex.pdiff_gated if kind == "p" else ex.ndiff_gated
        with np.errstate(divide="ignore"):
            limit = est.vbe_on / est.required
        has_tap = np.isin(pieces.body, est.taps.body)
        # No finding without a sheet value, or without any contacted tap in the body
        # (floating-well and tap-distance report those); pad-connected devices are
        # injection-bias's, which follows their injected current to where it does harm.
        failing = np.flatnonzero(~np.isnan(est.ohm) & has_tap & (est.ohm > limit) & ~est.pad)
        # One finding per drawn shape: its worst piece.
        order = failing[np.lexsort((-est.ohm[failing], pieces.shape[failing]))]
        first = np.r_[True, pieces.shape[order][1:] != pieces.shape[order][:-1]] if len(order) else []
        bounds = shapely.bounds(pieces.geoms)
        chosen = order[first]
        _, nearest = nearest_taps(pieces.select(chosen), est.taps)
        for i, tap in zip(chosen.tolist(), nearest.tolist(), strict=False):
            body_kind = kind if kind == "p" or pieces.body[i] == SUBSTRATE else "pwell"
            body, tap_name = BODY[body_kind]
            role = "pad-connected" if est.pad[i] else "core"
            ohm = float(est.ohm[i])
            words = dict(what=describe(kind, bool(gated[i])), body=body, tap=tap_name, role=role,
                         required=si(est.required[i], "A"))
            related = ()
            if tap >= 0:
                related = (ctx.related_shape(int(est.taps.shape[tap]), f"nearest {tap_name}"),)
            finite = np.isfinite(ohm)
            message = (MESSAGE.format(ohm=si(ohm, "ohm"), trigger=si(est.vbe_on / ohm, "A"), **words)
                       if finite else MESSAGE_NO_PATH.format(**words))
            yield ctx.piece_finding(
                RULE, pieces, i, message,
                location=shapely.get_coordinates(shapely.point_on_surface(pieces.geoms[i]))[0],
                bbox=bounds[i], value=ohm if finite else None, limit=float(f"{limit[i]:.6g}"), unit="ohm",
                related=related,
                figures={"shunt_ohm": ohm if finite else None,
                         "trigger_current_a": est.vbe_on / ohm if finite else 0.0,
                         "required_current_a": float(est.required[i]), "pad_connected": bool(est.pad[i]),
                         "sheet_ohm_per_square": float(est.sheet[i]), "basis": "estimate from a sheet model"},
                device_kind=DEVICE_KIND[kind],
            )


RULE = Rule(
    id="shunt-resistance",
    severity=Severity.WARNING,
    summary=("The estimated well or substrate resistance from a device to its taps lets less than the "
             "configured current forward-bias the junction."),
    doc=RuleDoc(
        flags=(
            "Every core (not pad-connected) P+ device diffusion in an n-well, and every core N+ device "
            "diffusion in the substrate or in an isolated p-well, whose estimated shunt resistance R to the "
            "contacted taps of its body exceeds vbe_on / I, where I is [electrical] core_current. Pad-connected "
            "devices are left to injection-bias: comparing their whole injection_current (0.1 A) with one "
            "shunt asked for under 7 ohm, which no well or substrate sheet gives, so every pad device warned, "
            "however well ringed; injection-bias follows the injected carriers to the bodies that collect "
            "them instead. No standard sets a core device's current; the default core_current of 100 uA is chosen so "
            "that a 2 um wide device 20 um down a 5 um wide n-well of 1 kohm/sq from its tap (R about 4 kohm) "
            "passes, in line with a 20 um tap-distance rule: set it from your own qualification data. The "
            "message, the hover and the --devices table give R and the trigger current vbe_on / R with three "
            "significant figures.\n\n"
            "The figures are estimates from a sheet model. Each body is a sheet of uniform sheet resistance "
            "(nwell_sheet, pwell_sheet, psub_sheet, or from doping and depth with the Masetti mobility model); "
            "the device diffusion is an equipotential electrode and every contacted tap of the body is "
            "grounded; other diffusions do not change the sheet. The substrate is a sheet over the layout's "
            "extent plus 5 um, with every n-well, deep n-well and isolated p-well cut out: the current under "
            "the wells (through the bulk below them) is ignored, which can only raise the estimate, and a "
            "substrate island fenced in by a well ring with no tap of its own has no path at all. A large "
            "body is solved in a window around each device that reaches 1.5 times the distance to its "
            "second-nearest tap (cutting the sheet away also only raises R); repeated cells are solved once. "
            "The grid follows every edge of Manhattan shapes exactly (oblique and curved edges are "
            "staircased); its discretization puts the estimate 0 to 6% above the converged sheet solution on "
            "the validation layouts ([electrical] sheet_grid sets a uniform, finer grid). A plain check skips "
            "devices that a straight-channel bound already proves 10% inside their limit; --devices and the "
            "editor estimate every device."
        ),
        why=(
            "Current flowing in a well or the substrate (carriers injected at an I/O pin, supply bounce, a "
            "drain briefly outside the rails) returns to the taps through the well or substrate resistance "
            "that shunts the base-emitter junction of a parasitic bipolar. Once that current times the "
            "resistance reaches the junction turn-on voltage (vbe_on, about 0.6-0.7 V) the bipolar turns on, "
            "and with its partner in the PNPN stack it can regenerate into a supply-to-ground short. The "
            "smaller the resistance, the more current the device withstands; distance rules are a proxy for "
            "this figure."
        ),
        example=(
            "box(cell, NWELL, 0, 0, 60, 5)\n"
            "box(cell, NPLUS, 0.5, 1, 1.5, 4)          # the only n-tap, at the left end\n"
            "box(cell, ACTIVE, 0.5, 1, 1.5, 4)\n"
            "box(cell, CONTACT, 0.8, 2.3, 1.2, 2.7)\n"
            "box(cell, PPLUS, 55, 1, 58, 4)            # P+ diffusion 54 um down a 5 um wide well\n"
            "box(cell, ACTIVE, 55, 1, 58, 4)"
        ),
        fix=(
            "Lower the resistance: put contacted taps closer to the device and on more sides of it (a tap "
            "ring is best), widen the well path between device and tap, or use more tap area. For a "
            "pad-connected device, guard rings collect most injected current before it reaches the shunt."
        ),
    ),
    check=check,
)
