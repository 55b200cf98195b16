"""tap-supply: an n-tap not on a power net or a p-tap not on a ground net, and a net
labelled with two different supply names (nets in analyzers/extraction/nets.py)."""

from __future__ import annotations

import numpy as np
import shapely

from latchwatch.analyzers.extraction.connectivity import NTAP, PTAP
from latchwatch.analyzers.extraction.nets import nets
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules.base import Rule, RuleDoc

SUPPLY = {"n": ("n-tap", "power", NTAP), "p": ("p-tap", "ground", PTAP)}
MESSAGE_WRONG = "{tap} is on net {net}, which is not a {supply} net ({patterns})"
MESSAGE_UNNAMED = "{tap} is on a net with no label; the layout names supplies ({names}) but none reaches it"
MESSAGE_SHORT = "net labelled {first} here is also labelled {second}: two supplies are joined"


def check(ctx):
    """Findings for taps on the wrong supply or on no named net, and nets with two supply names."""
    ln = nets(ctx)
    if ln.conn is None:
        return
    ex = ctx.extraction
    shorted = np.zeros(ln.conn.n_nets, dtype=bool)
    seen = set()
    for net, first, second in ln.conflicts:
        shorted[net] = True
        a, b = ctx.flat.label_text[first], ctx.flat.label_text[second]
        key = (a, b, int(ctx.flat.label_stack[second]))
        if key in seen:  # the same pair of labels in another placed copy
            continue
        seen.add(key)
        yield ctx.label_finding(RULE, second, MESSAGE_SHORT.format(first=b, second=a),
                                related=(ctx.related_label(first, f"label {a} on the same net"),))
    for kind in ("n", "p"):
        tap, supply, code = SUPPLY[kind]
        pieces = ex.ntap if kind == "n" else ex.ptap
        contacted = ex.ntap_contacted if kind == "n" else ex.ptap_contacted
        piece, net = ln.net_of(code)
        # An uncontacted tap reaches no net; uncontacted-tap says so already.
        keep = contacted[piece] & ~shorted[net]
        piece, net = piece[keep], net[keep]
        expected = ln.power if kind == "n" else ln.ground
        patterns = ", ".join(ctx.tech.power if kind == "n" else ctx.tech.ground) or "none declared"
        named = np.zeros(ln.conn.n_nets, dtype=bool)
        named[list(ln.names)] = True
        wrong = named[net] & ~expected[net]
        unnamed = ~named[net] if ln.supply_names else np.zeros(len(net), dtype=bool)
        bounds = shapely.bounds(pieces.geoms)
        done = set()
        for i, n, is_wrong in zip(piece[wrong | unnamed].tolist(), net[wrong | unnamed].tolist(),
                                  wrong[wrong | unnamed].tolist(), strict=False):
            shape = int(pieces.shape[i])
            if shape in done:
                continue
            done.add(shape)
            where = shapely.get_coordinates(shapely.point_on_surface(pieces.geoms[i]))[0]
            if is_wrong:
                yield ctx.piece_finding(
                    RULE, pieces, i, MESSAGE_WRONG.format(tap=tap, net=ln.display_name(n), supply=supply,
                                                      patterns=patterns),
                    location=where, bbox=bounds[i])
            else:
                yield ctx.piece_finding(
                    RULE, pieces, i, MESSAGE_UNNAMED.format(tap=tap, names=", ".join(ln.supply_names)),
                    location=where, bbox=bounds[i]).with_severity(Severity.INFO)


RULE = Rule(
    id="tap-supply",
    severity=Severity.WARNING,
    summary="An n-tap not on a power net, or a p-tap not on a ground net (when the layout has labels).",
    doc=RuleDoc(
        flags=(
            "When the layout labels nets (text on a [labels] layer, on a conductor of that role): every "
            "contacted n-tap whose net carries a name but none matching [nets] power, and every contacted "
            "p-tap whose net carries no name matching [nets] ground. Nets are followed from the tap through "
            "the cuts of [connectivity] stack to every conductor level, so a label on any labelled level "
            "names the tap's net. A tap on a net with no label at all is reported at information level when "
            "the layout names some supply elsewhere (the tap may be tied by a level that carries no label). "
            "A net that carries two different supply names (VDD and VSS, or VDD and VDD2) is reported too, "
            "on the line of one label with the other as related location: the two supplies are joined."
        ),
        why=(
            "A tap ties its body only to the potential of the net it is on. An n-well tied to a signal, or a "
            "substrate tap tied to anything but ground, leaves the base of the parasitic bipolar free to "
            "move with that signal: when the signal swings, the well or substrate junction can be "
            "forward-biased by more than the turn-on voltage (about 0.6-0.7 V) and inject the very current "
            "that triggers the PNPN loop. A net joining two supplies is a short of its own, and hides which "
            "supply the taps on it really hold."
        ),
        example=(
            "box(cell, NPLUS, 0.3, 8.6, 1.7, 9.9)\n"
            "box(cell, ACTIVE, 0.5, 8.8, 1.5, 9.7)          # n-tap\n"
            "box(cell, CONTACT, 0.8, 9.05, 1.2, 9.45)\n"
            "box(cell, METAL1, 0, 8.8, 2, 10)\n"
            "cell.add(gdstk.Label('OUT', (1, 9.4), layer=7, texttype=5))   # the tap's metal is OUT"
        ),
        fix=(
            "Connect n-taps to the power rail and p-taps to the ground rail, and label the rails with names "
            "the technology's [nets] patterns match; keep differently named supplies on separate metal."
        ),
    ),
    check=check,
)
