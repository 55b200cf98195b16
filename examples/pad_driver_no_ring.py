"""Quillfern QF-S12 "Saltmarsh": the first sketch of the SDO (serial data out) pad driver.

The same driver as pad_driver.py with no guard ring at all: the NMOS has a substrate
tap strip beside it and the PMOS an n-well tap strip, enough for the tap-distance rule,
and nothing collects the carriers either transistor injects when the pad leaves the
rails. The pre-driver, a core inverter, sits 22 um to the left. Coordinates in micrometres, demo technology.
"""

import gdstk

NWELL, ACTIVE, POLY, NPLUS, PPLUS, CONTACT, METAL1 = (1, 0), (2, 0), (3, 0), (4, 0), (5, 0), (6, 0), (7, 0)
VIA1, METAL2 = (8, 0), (9, 0)
METAL1_PIN, METAL2_PIN = (7, 5), (9, 5)
FINGER_L, DEVICE_W, DEVICE_H = 1.0, 13.0, 6.0
RING_W, RING_SPACE = 2.0, 3.0  # ring width, and its distance from the transistor


def box(cell, layer, x0, y0, x1, y1):
    cell.add(gdstk.rectangle((x0, y0), (x1, y1), layer=layer[0], datatype=layer[1]))


def contact_row(cell, x0, y0, x1, y1, pitch=1.5):
    """Contacts 0.4 um square along the longer side of a box."""
    horizontal = x1 - x0 >= y1 - y0
    length = (x1 - x0) if horizontal else (y1 - y0)
    for i in range(int((length - 0.6) // pitch) + 1):
        if horizontal:
            cx, cy = x0 + 0.3 + i * pitch, (y0 + y1) / 2 - 0.2
        else:
            cx, cy = (x0 + x1) / 2 - 0.2, y0 + 0.3 + i * pitch
        box(cell, CONTACT, cx, cy, cx + 0.4, cy + 0.4)


def tap_strip(cell, implant, x0, y0, x1, y1, name):
    """A contacted tap strip with metal1 on top of it and the supply's label."""
    box(cell, implant, x0, y0, x1, y1)
    box(cell, ACTIVE, x0, y0, x1, y1)
    box(cell, METAL1, x0, y0, x1, y1)
    contact_row(cell, x0, y0, x1, y1)
    cell.add(gdstk.Label(name, ((x0 + x1) / 2, (y0 + y1) / 2), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))


def tap(cell, implant, x, y, name):
    """A contacted 2 um tap with metal1 and the supply's label."""
    box(cell, implant, x, y, x + 2, y + 2)
    box(cell, ACTIVE, x, y, x + 2, y + 2)
    box(cell, CONTACT, x + 0.8, y + 0.8, x + 1.2, y + 1.2)
    box(cell, METAL1, x, y, x + 2, y + 2)
    cell.add(gdstk.Label(name, (x + 1, y + 1), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))


def pre_driver(cell, x0, y0):
    """The core inverter that drives the gates: a PMOS in its own n-well with the well's
    tap at the far (left) end, and an NMOS beside a substrate tap."""
    box(cell, NWELL, x0, y0 + 8.0, x0 + 14.0, y0 + 20.0)
    tap(cell, NPLUS, x0 + 1.0, y0 + 12.0, "VDD")
    box(cell, PPLUS, x0 + 6.0, y0 + 12.0, x0 + 10.0, y0 + 15.0)
    box(cell, ACTIVE, x0 + 6.0, y0 + 12.0, x0 + 10.0, y0 + 15.0)  # pre-driver PMOS
    tap(cell, PPLUS, x0 + 1.0, y0 + 1.0, "VSS")
    box(cell, NPLUS, x0 + 6.0, y0 + 1.0, x0 + 10.0, y0 + 4.0)
    box(cell, ACTIVE, x0 + 6.0, y0 + 1.0, x0 + 10.0, y0 + 4.0)  # pre-driver NMOS
    box(cell, POLY, x0 + 7.5, y0 + 0.0, x0 + 8.5, y0 + 16.0)


def output_transistor(cell, implant, x0, y0, gate_below):
    """Three fingers; source strips run to the ring on the far side from the gate bar.

    Returns (drain bus y, gate bar y)."""
    box(cell, implant, x0 - 0.2, y0 - 0.2, x0 + DEVICE_W + 0.2, y0 + DEVICE_H + 0.2)
    box(cell, ACTIVE, x0, y0, x0 + DEVICE_W, y0 + DEVICE_H)  # output transistor
    bar = y0 - 2.0 if gate_below else y0 + DEVICE_H + 1.0
    for gx in (2.0, 6.0, 10.0):
        box(cell, POLY, x0 + gx, min(bar, y0 - 1.0), x0 + gx + FINGER_L, max(bar + 1.0, y0 + DEVICE_H + 1.0))
    box(cell, POLY, x0 - 2.0, bar, x0 + 11.0, bar + 1.0)  # the bar joining the fingers
    ring_edge = y0 - RING_SPACE - 1.0 if gate_below else y0 + DEVICE_H + RING_SPACE + 1.0
    drain_bus = y0 + DEVICE_H + 2.0 if gate_below else y0 - 2.0
    for sx0, sx1, is_source in ((0.0, 2.0, True), (3.0, 6.0, False), (7.0, 10.0, True), (11.0, 13.0, False)):
        contact_row(cell, x0 + sx0 + 0.3, y0 + 0.5, x0 + sx1 - 0.3, y0 + DEVICE_H - 0.5, pitch=1.5)
        far = ring_edge if is_source else drain_bus
        box(cell, METAL1, x0 + sx0 + 0.3, min(y0 + 0.3, far), x0 + sx1 - 0.3, max(y0 + DEVICE_H - 0.3, far))
    box(cell, METAL1, x0 + 3.3, drain_bus - 0.5, x0 + 12.7, drain_bus + 0.5)  # drain bus
    box(cell, VIA1, x0 + 12.0, drain_bus - 0.2, x0 + 12.4, drain_bus + 0.2)
    return drain_bus, bar


def poly_gate_feed(cell, x0, bar, name):
    """The gate bar carried out in poly to the pre-driver, through the ring's gap."""
    box(cell, POLY, x0 - 14.0, bar, x0 - 2.0, bar + 1.0)
    box(cell, CONTACT, x0 - 13.8, bar + 0.3, x0 - 13.4, bar + 0.7)
    box(cell, METAL1, x0 - 14.0, bar, x0 - 13.0, bar + 1.0)
    cell.add(gdstk.Label(name, (x0 - 13.5, bar + 0.5), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))


def gate_feed(cell, x0, bar, name):
    """Poly contact at the end of the gate bar; metal2 over the ring to the pre-driver."""
    box(cell, CONTACT, x0 - 1.8, bar + 0.3, x0 - 1.4, bar + 0.7)
    box(cell, METAL1, x0 - 2.0, bar, x0 - 1.0, bar + 1.0)
    box(cell, VIA1, x0 - 1.7, bar + 0.3, x0 - 1.3, bar + 0.7)
    box(cell, METAL2, x0 - 14.0, bar, x0 - 1.0, bar + 1.0)
    cell.add(gdstk.Label(name, (x0 - 13.0, bar + 0.5), layer=METAL2_PIN[0], texttype=METAL2_PIN[1]))


def sdo_driver():
    cell = gdstk.Cell("SDO_DRIVER")
    # NMOS at (0, 0) in its P+ ring.
    n_drain, n_bar = output_transistor(cell, NPLUS, 0.0, 0.0, gate_below=True)
    ring = RING_SPACE + RING_W
    tap_strip(cell, PPLUS, DEVICE_W + RING_SPACE, 0.0, DEVICE_W + ring, DEVICE_H, "VSS")  # substrate taps, right of the NMOS
    cell.add(gdstk.Label("VSS", (DEVICE_W / 2, -ring + 1.0), layer=METAL1_PIN[0], texttype=METAL1_PIN[1]))
    poly_gate_feed(cell, 0.0, n_bar, "SDO_N")
    # PMOS 23 um above it, in an n-well with an N+ ring.
    p_y = DEVICE_H + 23.0
    box(cell, NWELL, -ring - 2.0, p_y - ring - 2.0, DEVICE_W + ring + 2.0, p_y + DEVICE_H + ring + 2.0)
    p_drain, p_bar = output_transistor(cell, PPLUS, 0.0, p_y, gate_below=False)
    tap_strip(cell, NPLUS, DEVICE_W + RING_SPACE, p_y, DEVICE_W + ring, p_y + DEVICE_H, "VDD")  # n-well taps, right of the PMOS
    cell.add(gdstk.Label("VDD", (DEVICE_W / 2, p_y + DEVICE_H + ring - 1.0), layer=METAL1_PIN[0],
                         texttype=METAL1_PIN[1]))
    gate_feed(cell, 0.0, p_bar, "SDO_P")
    pre_driver(cell, -36.0, 0.0)
    # Both drains on metal2, out to the bond pad.
    box(cell, METAL2, 11.8, n_drain - 0.5, 12.8, p_drain + 0.5)
    box(cell, METAL2, 11.8, 16.0, 40.0, 18.0)
    box(cell, METAL2, 40.0, 7.0, 60.0, 27.0)  # bond pad
    cell.add(gdstk.Label("PAD_SDO", (50.0, 17.0), layer=METAL2_PIN[0], texttype=METAL2_PIN[1]))
    return cell


lib = gdstk.Library("QF_S12_SDO_SKETCH")
lib.add(sdo_driver())
lib.write_gds("pad_driver_no_ring.gds")
