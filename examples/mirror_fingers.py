"""Quillfern QF-S12 "Saltmarsh": the PMOS mirror that drives the bridge excitation.

Two eight-finger halves share one n-well. N-well tap strips run along the top and
the bottom of the pair, and a third strip stands between the two halves.
Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
CONTACT_PITCH = 1.0


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def pmos_fingers(cell, x0, y0, fingers, w=4.0, l=0.5, gap=0.8):
    """A multi-finger PMOS: one diffusion crossed by `fingers` gates."""
    length = gap + fingers * (l + gap)
    box(cell, PPLUS, x0 - 0.2, y0 - 0.2, x0 + length + 0.2, y0 + w + 0.2)
    box(cell, ACTIVE, x0, y0, x0 + length, y0 + w)
    for i in range(fingers):
        gx = x0 + gap + i * (l + gap)
        box(cell, POLY, gx, y0 - 0.6, gx + l, y0 + w + 0.6)
    for i in range(fingers + 1):
        for cy in (y0 + 0.6, y0 + 1.8, y0 + 3.0):
            box(cell, CONTACT, x0 + 0.2 + i * (l + gap), cy, x0 + 0.6 + i * (l + gap), cy + 0.4)
    return length


def ntap(cell, x0, y0, x1, y1):
    box(cell, NPLUS, x0 - 0.2, y0 - 0.2, x1 + 0.2, y1 + 0.2)
    box(cell, ACTIVE, x0, y0, x1, y1)
    box(cell, METAL1, x0, y0, x1, y1)
    count = int((x1 - x0 - 0.2) // CONTACT_PITCH)
    ym = (y0 + y1) / 2
    for i in range(count):
        cx = x0 + 0.3 + i * CONTACT_PITCH
        box(cell, CONTACT, cx, ym - 0.2, cx + 0.4, ym + 0.2)


def mirror_pair(fingers, w=4.0):
    cell = gdstk.Cell(f"PMIRROR_2X{fingers}")
    half = pmos_fingers(cell, 0.0, 0.0, fingers, w=w)
    pmos_fingers(cell, half + 2.0, 0.0, fingers, w=w)
    right = 2 * half + 2.0
    ntap(cell, -1.0, w + 1.5, right + 1.0, w + 2.5)  # top strip
    ntap(cell, -1.0, -2.5, right + 1.0, -1.5)  # bottom strip
    ntap(cell, half + 0.5, 0.0, half + 1.5, w)  # between the halves
    box(cell, NWELL, -3.0, -4.5, right + 3.0, w + 4.5)
    return cell


lib = gdstk.Library("QF_S12_EXCITATION")
lib.add(mirror_pair(fingers=8))
lib.write_gds("mirror_fingers.gds")
