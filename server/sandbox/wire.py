"""The binary form in which the probe ships a captured layout, parent side.

A payload is MAGIC, a little-endian u64 header length, a JSON header, then raw array
bytes at the offsets the header's ``arrays`` table names. The format, its encoder and
its field schema live in server/child/wire_format.py (the child cannot import
latchwatch); this module decodes, checking
every length and offset so a truncated or foreign payload gives a clear error.
"""

from __future__ import annotations

import json
import math
import struct

import numpy as np

from latchwatch.analyzers.model.captured import NAMING_KINDS, CapturedCell, CapturedLayout, NamedCell
from latchwatch.analyzers.model.findings import Frame
from latchwatch.server.child.wire_format import DTYPES, FIELDS, MAGIC, WIRE_VERSION, encode_payload

__all__ = ["WireError", "encode_payload", "decode_payload", "layout_from_parts", "decode_layout",
           "frame_from_row"]

_PREFIX = len(MAGIC) + 8


class WireError(ValueError):
    """The payload from the child is not a well-formed captured layout."""


def decode_payload(buffer: bytes | bytearray | memoryview) -> tuple[dict, list[np.ndarray]]:
    """Split a payload into its header and arrays (views into ``buffer``, no copy)."""
    view = memoryview(buffer)
    if len(view) < _PREFIX or bytes(view[: len(MAGIC)]) != MAGIC:
        raise WireError(f"payload does not start with the latchwatch marker ({len(view)} bytes received)")
    (header_length,) = struct.unpack_from("<Q", view, len(MAGIC))
    data_start = _PREFIX + header_length
    if data_start > len(view):
        raise WireError(f"payload truncated: header of {header_length} bytes, {len(view)} bytes in all")
    try:
        header = json.loads(bytes(view[_PREFIX:data_start]).decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as error:
        raise WireError(f"payload header is not valid JSON: {error}") from None
    except RecursionError:
        raise WireError("payload header nests deeper than a layout header does") from None
    if not isinstance(header, dict) or header.get("version") != WIRE_VERSION:
        raise WireError(f"payload header has version {header.get('version') if isinstance(header, dict) else None!r},"
                        f" expected {WIRE_VERSION}")
    arrays = []
    for number, descriptor in enumerate(header.get("arrays", [])):
        try:
            dtype, shape, offset, nbytes = descriptor
            shape = tuple(int(n) for n in shape)
            offset, nbytes = int(offset), int(nbytes)
        except (TypeError, ValueError):
            raise WireError(f"array {number}: malformed descriptor {descriptor!r}") from None
        if dtype not in DTYPES:
            raise WireError(f"array {number}: unexpected dtype {dtype!r}")
        if any(n < 0 for n in shape):
            raise WireError(f"array {number}: negative dimension in shape {shape}")
        count = math.prod(shape)  # Python integers: a forged shape cannot overflow into a small count
        if count * np.dtype(dtype).itemsize != nbytes or offset < 0:
            raise WireError(f"array {number}: {nbytes} bytes do not hold shape {shape} of {dtype}")
        start = data_start + offset
        if start + nbytes > len(view):
            raise WireError(f"array {number}: payload truncated ({len(view)} bytes, array ends at {start + nbytes})")
        arrays.append(np.frombuffer(view, dtype=dtype, count=count, offset=start).reshape(shape))
    return header, arrays


def frame_from_row(row) -> Frame:
    """A Frame from a header's frame row (missing columns are None)."""
    file, line, function, column, end_line, end_column = (list(row) + [None] * 6)[:6]
    return Frame(str(file), int(line), str(function), column, end_line, end_column)


def layout_from_parts(header: dict, arrays: list[np.ndarray]) -> CapturedLayout:
    """Build the CapturedLayout a successful probe header and its arrays describe."""
    cells = []
    for number, entry in enumerate(header.get("cells", [])):
        cell = CapturedCell(name=str(entry.get("name", "")))
        for field, index in entry.get("fields", {}).items():
            if field not in FIELDS:
                raise WireError(f"cell {cell.name!r}: unknown field {field!r}")
            if not 0 <= index < len(arrays):
                raise WireError(f"cell {cell.name!r}: field {field} names array {index}, "
                                f"the payload has {len(arrays)}")
            dtype, row_shape = FIELDS[field]
            array = arrays[index]
            if array.dtype.str != dtype or array.shape[1:] != row_shape:
                raise WireError(f"cell {cell.name!r}: field {field} has dtype {array.dtype.str} and shape "
                                f"{array.shape}, expected {dtype} rows of shape {row_shape}")
            setattr(cell, field, array)
        cell.label_text = [str(t) for t in entry.get("labels", [])]
        _check_cell(cell, number, len(header.get("cells", [])))
        cells.append(cell)
    frames = [frame_from_row(row) for row in header.get("frames", [])]
    stacks = [tuple(int(i) for i in stack) for stack in header.get("stacks", [])]
    for stack in stacks:
        if any(not 0 <= i < len(frames) for i in stack):
            raise WireError(f"stack {stack} names a frame outside the table of {len(frames)}")
    return CapturedLayout(cells=cells, frames=frames, stacks=stacks,
                          source=str(header.get("source", "")), unit=float(header.get("unit", 1e-6)),
                          precision=float(header.get("precision", 1e-9)),
                          named=_named_cells(header.get("named", []), len(cells), len(stacks)),
                          imports=tuple(str(name) for name in header.get("imports", [])))


def _named_cells(rows, cell_count: int, stack_count: int) -> list[NamedCell]:
    """The header's ``named`` rows ([cell index, how, detail, stack id]) as records, each checked."""
    named = []
    for row in rows:
        try:
            cell, how, detail, stack = row
            cell, stack = int(cell), int(stack)
        except (TypeError, ValueError):
            raise WireError(f"named cell {row!r}: expected [cell index, how, detail, stack id]") from None
        if not 0 <= cell < cell_count or not -1 <= stack < stack_count or how not in NAMING_KINDS:
            raise WireError(f"named cell {row!r}: cell outside 0..{cell_count - 1}, stack outside "
                            f"-1..{stack_count - 1} or how not one of {', '.join(NAMING_KINDS)}")
        named.append(NamedCell(cell, how, str(detail), stack))
    return named


_LABEL_FIELDS = ("label_texttype", "label_origin", "label_stack")
_REFERENCE_FIELDS = ("ref_origin", "ref_rotation", "ref_magnification", "ref_x_reflection", "ref_columns",
                     "ref_rows", "ref_v1", "ref_v2", "ref_stack")


def _check_cell(cell: CapturedCell, number: int, cell_count: int) -> None:
    """Every array agrees with the others, so that flattening indexes only what is there
    (a forged payload is a WireError here, not an IndexError there)."""
    n = len(cell.poly_layer)
    if not (len(cell.poly_datatype) == len(cell.poly_stack) == n and len(cell.poly_offsets) == n + 1):
        raise WireError(f"cell {cell.name!r}: polygon arrays disagree in length")
    if any(len(getattr(cell, name)) != len(cell.label_layer) for name in _LABEL_FIELDS):
        raise WireError(f"cell {cell.name!r}: label arrays disagree in length")
    if any(len(getattr(cell, name)) != len(cell.ref_cell) for name in _REFERENCE_FIELDS):
        raise WireError(f"cell {cell.name!r}: reference arrays disagree in length")
    if len(cell.ref_explicit_offsets) and (cell.ref_explicit_offsets[0] != 0
                                           or np.any(np.diff(cell.ref_explicit_offsets) < 0)):
        raise WireError(f"cell {cell.name!r}: explicit repetition offsets are not ascending from 0")
    if n and (cell.poly_offsets[0] != 0 or cell.poly_offsets[-1] != len(cell.points)
              or np.any(np.diff(cell.poly_offsets) < 0)):
        raise WireError(f"cell {cell.name!r}: polygon offsets do not index its {len(cell.points)} points")
    if len(cell.label_text) != len(cell.label_layer):
        raise WireError(f"cell {cell.name!r}: {len(cell.label_text)} label texts for {len(cell.label_layer)} labels")
    if len(cell.ref_cell) and (cell.ref_cell.min() < 0 or cell.ref_cell.max() >= cell_count):
        raise WireError(f"cell {cell.name!r} (number {number}): a reference names a cell outside 0..{cell_count - 1}")
    if len(cell.ref_explicit_offsets) != len(cell.ref_cell) + 1 or cell.ref_explicit_offsets[-1] != len(cell.ref_explicit):
        raise WireError(f"cell {cell.name!r}: explicit repetition offsets do not index its offsets")


def decode_layout(buffer: bytes | bytearray | memoryview) -> CapturedLayout:
    """The CapturedLayout of a successful payload; WireError for anything else."""
    header, arrays = decode_payload(buffer)
    if header.get("status") != "ok":
        raise WireError(f"payload reports status {header.get('status')!r}, not a layout")
    return layout_from_parts(header, arrays)
