"""Quillfern QF-S12 "Saltmarsh": the binary-weighted NMOS switches of the gain DAC.

Each switch is a multi-finger NMOS generated from its total width and finger
count; the bank places them side by side over one substrate-tap strip.
Coordinates in micrometres, demo technology.
"""

import gdstk

ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
MIN_FINGER_W = 0.6
BANK = [("SW1", 2.0, 1), ("SW2", 4.0, 2), ("SW4", 8.0, 4), ("SW8", 8.0, 16)]


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def switch(name, w, fingers, l=0.35, gap=0.8):
    finger_w = w / fingers
    if finger_w < MIN_FINGER_W:
        raise ValueError(f"{name}: finger width {finger_w:.2f} um is below the {MIN_FINGER_W} um minimum")
    cell = gdstk.Cell(name)
    length = gap + fingers * (l + gap)
    box(cell, NPLUS, -0.2, -0.2, length + 0.2, finger_w + 0.2)
    box(cell, ACTIVE, 0, 0, length, finger_w)
    for i in range(fingers):
        box(cell, POLY, gap + i * (l + gap), -0.5, gap + i * (l + gap) + l, finger_w + 0.5)
    for i in range(fingers + 1):
        box(cell, CONTACT, 0.2 + i * (l + gap), finger_w / 2 - 0.2, 0.6 + i * (l + gap), finger_w / 2 + 0.2)
    return cell, length


bank = gdstk.Cell("GAIN_DAC_SWITCHES")
lib = gdstk.Library("QF_S12_GAIN_DAC")
x = 0.0
for name, width, fingers in BANK:
    cell, length = switch(name, width, fingers)
    bank.add(gdstk.Reference(cell, (x, 0)))
    lib.add(cell)
    x += length + 2.0
box(bank, PPLUS, -0.2, -3.2, x - 1.8, -1.8)
box(bank, ACTIVE, 0, -3.0, x - 2.0, -2.0)  # substrate tap strip under the bank
for i in range(int((x - 2.0) // 1.0)):
    box(bank, CONTACT, 0.3 + i, -2.7, 0.7 + i, -2.3)
box(bank, METAL1, 0, -3.0, x - 2.0, -2.0)
lib.add(bank)
lib.write_gds("switch_bank.gds")
