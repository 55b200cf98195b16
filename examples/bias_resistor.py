"""Quillfern QF-S12 "Saltmarsh": the reference-current generator of the bridge front end.

A serpentine P+ diffusion resistor in its own n-well sets the reference current,
and a four-finger NMOS mirror beside it copies it; the mirror has a substrate tap
along its lower edge. Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
METAL1_PIN = (7, 5)


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def pplus_resistor(cell, x0, y0, legs, length, width=1.0, space=1.5):
    pitch = width + space
    box(cell, NWELL, x0 - 2.0, y0 - 2.0, x0 + legs * pitch - space + 2.0, y0 + length + 2.0)
    for i in range(legs):
        x = x0 + i * pitch
        box(cell, PPLUS, x - 0.2, y0 - 0.2, x + width + 0.2, y0 + length + 0.2)
        box(cell, ACTIVE, x, y0, x + width, y0 + length)
        for y in (y0 + 0.3, y0 + length - 0.7):
            box(cell, CONTACT, x + 0.3, y, x + 0.7, y + 0.4)
    for i in range(legs - 1):  # join the legs alternately at the top and the bottom
        y = y0 + length - 1.0 if i % 2 == 0 else y0
        box(cell, METAL1, x0 + i * pitch, y, x0 + (i + 1) * pitch + width, y + 1.0)


def nmos_mirror(cell, x0, y0, fingers, w=4.0, l=1.0, gap=1.0):
    length = gap + fingers * (l + gap)
    box(cell, NPLUS, x0 - 0.2, y0 - 0.2, x0 + length + 0.2, y0 + w + 0.2)
    box(cell, ACTIVE, x0, y0, x0 + length, y0 + w)
    for i in range(fingers):
        gx = x0 + gap + i * (l + gap)
        box(cell, POLY, gx, y0 - 0.6, gx + l, y0 + w + 0.6)
    for i in range(fingers + 1):  # one contact column in every source/drain gap
        cx = x0 + 0.3 + i * (l + gap)
        for cy in (y0 + 0.8, y0 + 2.8):
            box(cell, CONTACT, cx, cy, cx + 0.4, cy + 0.4)
    return length


def substrate_tap(cell, x0, y0, x1, y1, pitch=1.0):
    box(cell, PPLUS, x0 - 0.2, y0 - 0.2, x1 + 0.2, y1 + 0.2)
    box(cell, ACTIVE, x0, y0, x1, y1)
    box(cell, METAL1, x0, y0, x1, y1)
    for i in range(int((x1 - x0 - 0.2) // pitch)):
        box(cell, CONTACT, x0 + 0.3 + i * pitch, (y0 + y1) / 2 - 0.2, x0 + 0.7 + i * pitch, (y0 + y1) / 2 + 0.2)


top = gdstk.Cell("IREF_GEN")
pplus_resistor(top, 0.0, 0.0, legs=6, length=16.0)
mirror_length = nmos_mirror(top, 20.0, 0.0, fingers=4)
substrate_tap(top, 20.0, -2.5, 20.0 + mirror_length, -1.5)
top.add(gdstk.Label("VSS", (21.0, -2.0), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))

lib = gdstk.Library("QF_S12_IREF")
lib.add(top)
lib.write_gds("bias_resistor.gds")
