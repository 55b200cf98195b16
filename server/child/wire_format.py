"""The binary form in which a child ships a captured layout: one definition for child and parent.

A payload is MAGIC, a little-endian u64 header length, a JSON header, padding, then each
array's raw bytes at the offset the header's ``arrays`` table names (relative to the data
start, 8-byte aligned). Standard library only at import: the parent decodes with
server/sandbox/wire.py against FIELDS below.
"""

from __future__ import annotations

import json
import struct

MAGIC = b"LWGEO01\n"


WIRE_VERSION = 1


ALIGN = 8
DTYPES = {"<i4", "<i8", "<f8", "|b1", "|u1"}
# Per captured cell field: dtype and the trailing shape of each row.
FIELDS = {
    "poly_layer": ("<i4", ()), "poly_datatype": ("<i4", ()), "poly_offsets": ("<i8", ()),
    "points": ("<f8", (2,)), "poly_stack": ("<i4", ()),
    "label_layer": ("<i4", ()), "label_texttype": ("<i4", ()), "label_origin": ("<f8", (2,)),
    "label_stack": ("<i4", ()),
    "ref_cell": ("<i4", ()), "ref_origin": ("<f8", (2,)), "ref_rotation": ("<f8", ()),
    "ref_magnification": ("<f8", ()), "ref_x_reflection": ("|b1", ()), "ref_columns": ("<i4", ()),
    "ref_rows": ("<i4", ()), "ref_v1": ("<f8", (2,)), "ref_v2": ("<f8", (2,)),
    "ref_explicit_offsets": ("<i8", ()), "ref_explicit": ("<f8", (2,)), "ref_stack": ("<i4", ()),
}


def encode_payload(header, arrays):
    """Return the list of byte chunks for header plus arrays (numpy arrays or bytes)."""
    descriptors = []
    chunks = []
    offset = 0
    for array in arrays:
        if isinstance(array, (bytes, bytearray)):
            raw, dtype, shape = array, "|u1", [len(array)]
        else:
            import numpy as np  # only a payload with arrays needs it

            array = np.ascontiguousarray(array)
            raw, dtype, shape = array.reshape(-1).view(np.uint8), array.dtype.str, list(array.shape)
        descriptors.append([dtype, shape, offset, len(raw)])
        chunks.append(raw)
        pad = -len(raw) % ALIGN
        if pad:
            chunks.append(b"\0" * pad)
        offset += len(raw) + pad
    header = dict(header, arrays=descriptors, data_bytes=offset)
    text = json.dumps(header, separators=(",", ":")).encode("utf-8")
    text += b" " * (-(len(MAGIC) + 8 + len(text)) % ALIGN)
    return [MAGIC, struct.pack("<Q", len(text)), text] + chunks


def write_payload(fd, header, arrays):
    """Write a header and its arrays to the result pipe as one payload."""
    with open(fd, "wb", closefd=False) as out:
        for chunk in encode_payload(header, arrays):
            out.write(chunk)


def layout_header(unit, source, cells, tables):
    """The payload header of a captured layout: its cells' entries and the interned stacks."""
    return {
        "version": WIRE_VERSION,
        "status": "ok",
        "unit": unit,
        "source": source,
        "cells": cells,
        "frames": tables.frames,
        "stacks": [list(s) for s in tables.stacks],
    }


def failure_header(kind, exc_type, message, frames=(), stage="script"):
    """The payload header of a run that produced no layout; ``stage`` "capture" when latchwatch's
    capture of a script that ran failed, not the script."""
    return {
        "version": WIRE_VERSION,
        "status": kind,
        "exc_type": exc_type,
        "message": message,
        "frames": [list(f) for f in frames],
        "stage": stage,
    }
