"""QF-S12 bridge-excitation switch bank, the team's first generator in gdsfactory 9.

A row of PMOS switches that connect the excitation current to the bridge taps, in one
n-well. The generator places an n-well tap cell before every group of eight switches
(each group an instance array); the bank has 14 switches, so the second group holds
six, and no tap follows it. Coordinates in micrometres, demo technology layers.
"""

import gdsfactory as gf

gf.gpdk.PDK.activate()  # gdsfactory's generic PDK; the layers below are given as (layer, datatype)

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0)
PITCH = 4.0  # switch pitch along the row
GROUP = 8  # switches between two taps
GAP = 2.0  # room left before a group for its tap cell


def rect(c, layer, x0, y0, x1, y1):
    c.add_polygon([(x0, y0), (x1, y0), (x1, y1), (x0, y1)], layer=layer)


@gf.cell
def pmos_switch(w: float = 4.0, l: float = 0.5) -> gf.Component:
    """One switch: a 3 um P+ diffusion across a gate, contacted on both sides."""
    c = gf.Component()
    rect(c, ACTIVE, 0.0, 0.0, 3.0, w)  # switch diffusion
    rect(c, PPLUS, -0.2, -0.2, 3.2, w + 0.2)
    rect(c, POLY, 1.25, -0.5, 1.25 + l, w + 0.5)
    for x in (0.3, 2.2):
        rect(c, CONTACT, x, w / 2 - 0.25, x + 0.5, w / 2 + 0.25)
    return c


@gf.cell
def nwell_tap(h: float = 4.0) -> gf.Component:
    """An N+ tap 1.5 um wide, drawn with gdsfactory's own rectangle cells."""
    c = gf.Component()
    c << gf.components.rectangle(size=(1.5, h), layer=ACTIVE)
    c << gf.components.rectangle(size=(1.5, h), layer=NPLUS)
    contact = c << gf.components.rectangle(size=(0.5, 0.5), layer=CONTACT)
    contact.move((0.5, h / 2 - 0.25))
    return c


@gf.cell
def switch_bank(switches: int = 14) -> gf.Component:
    c = gf.Component()
    groups = [min(GROUP, switches - start) for start in range(0, switches, GROUP)]
    group_width = GAP + GROUP * PITCH
    rect(c, NWELL, -1.0, -1.0, len(groups) * group_width, 5.0)
    for g, count in enumerate(groups):
        x0 = g * group_width + GAP
        tap = c << nwell_tap()
        tap.move((x0 - 1.75, 0.0))
        fingers = c.add_ref(pmos_switch(), columns=count, rows=1, column_pitch=PITCH)
        fingers.move((x0, 0.0))
    return c


bank = switch_bank()
bank.write_gds("excitation_switches.gds")
