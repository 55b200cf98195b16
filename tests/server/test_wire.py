"""The probe's binary payload: round trip and clear errors on damaged input."""

import struct

import gdstk
import numpy as np
import pytest

from latchwatch.server.child import collect_gdstk, wire_format
from latchwatch.server.sandbox import wire


def _payload(header, arrays):
    return bytearray(b"".join(bytes(chunk) for chunk in wire.encode_payload(header, arrays)))


def _sample_cells():
    unit = gdstk.Cell("UNIT")
    unit.add(gdstk.rectangle((0, 0), (1, 2), layer=3, datatype=1))
    unit.add(gdstk.Polygon([(0, 0), (4, 0), (2, 3)], layer=5))
    unit.add(gdstk.Label("VDD", (0.5, 1.5), layer=7, texttype=5))
    top = gdstk.Cell("TOP")
    top.add(gdstk.Reference(unit, (10, 0), rotation=np.pi / 2, columns=2, rows=3, spacing=(5, 6)))
    return [top, unit]


def test_round_trip_keeps_every_array_exactly():
    header, arrays = collect_gdstk.collect(_sample_cells(), unit=1e-6, source="sample")
    layout = wire.decode_layout(_payload(header, arrays))
    direct = wire.layout_from_parts(header, arrays)
    assert [c.name for c in layout.cells] == ["TOP", "UNIT"]
    assert layout.source == "sample" and layout.unit == 1e-6
    for decoded, expected in zip(layout.cells, direct.cells, strict=False):
        for field in wire_format.FIELDS:
            got, want = getattr(decoded, field), getattr(expected, field)
            assert got.dtype == want.dtype and got.shape == want.shape, field
            np.testing.assert_array_equal(got, want, err_msg=field)
        assert decoded.label_text == expected.label_text
    unit = layout.cells[1]
    np.testing.assert_array_equal(unit.poly_layer, [3, 5])
    np.testing.assert_array_equal(unit.points[unit.poly_offsets[1]:unit.poly_offsets[2]], [(0, 0), (4, 0), (2, 3)])
    assert unit.label_text == ["VDD"]


def test_decoded_arrays_are_writable_views_of_a_bytearray():
    header, arrays = collect_gdstk.collect(_sample_cells())
    layout = wire.decode_layout(_payload(header, arrays))
    layout.cells[1].points[0, 0] = 42.0  # later stages may adjust in place
    assert layout.cells[1].points[0, 0] == 42.0


def test_empty_layout_round_trips():
    header, arrays = collect_gdstk.collect([gdstk.Cell("EMPTY")])
    layout = wire.decode_layout(_payload(header, arrays))
    assert layout.cells[0].name == "EMPTY"
    assert layout.cells[0].polygon_count == 0 and layout.cells[0].points.shape == (0, 2)


def test_failure_header_round_trips():
    header = wire_format.failure_header("error", "ValueError", "bad width", [["/x.py", 3, "f", 5, 3, 9]])
    decoded, arrays = wire.decode_payload(_payload(header, []))
    assert decoded["status"] == "error" and decoded["exc_type"] == "ValueError" and arrays == []
    assert wire.frame_from_row(decoded["frames"][0]).line == 3
    with pytest.raises(wire.WireError, match="status 'error'"):
        wire.decode_layout(_payload(header, []))


def test_wrong_marker_is_reported():
    with pytest.raises(wire.WireError, match="marker"):
        wire.decode_payload(b"hello world, not a payload")


def test_truncated_payload_is_reported():
    header, arrays = collect_gdstk.collect(_sample_cells())
    data = _payload(header, arrays)
    with pytest.raises(wire.WireError, match="truncated"):
        wire.decode_payload(data[:-9])
    with pytest.raises(wire.WireError, match="truncated"):
        wire.decode_payload(data[:30])


def test_foreign_version_and_bad_descriptor_are_reported():
    header, arrays = collect_gdstk.collect(_sample_cells())
    with pytest.raises(wire.WireError, match="version"):
        wire.decode_payload(_payload(dict(header, version=99), arrays))
    data = _payload(header, arrays)
    (length,) = struct.unpack_from("<Q", data, len(wire_format.MAGIC))
    text = bytes(data[len(wire_format.MAGIC) + 8: len(wire_format.MAGIC) + 8 + length]).replace(b'"<f8"', b'"<c16"', 1)
    with pytest.raises(wire.WireError, match="dtype"):
        wire.decode_payload(data[: len(wire_format.MAGIC) + 8] + text + data[len(wire_format.MAGIC) + 8 + length:])


def test_field_pointing_at_missing_array_is_reported():
    header, arrays = collect_gdstk.collect(_sample_cells())
    header["cells"][0]["fields"]["points"] = 999
    with pytest.raises(wire.WireError, match="names array 999"):
        wire.layout_from_parts(header, arrays)


def test_inconsistent_offsets_are_reported():
    header, arrays = collect_gdstk.collect(_sample_cells())
    index = header["cells"][1]["fields"]["poly_offsets"]
    arrays[index] = arrays[index] + 1
    with pytest.raises(wire.WireError, match="offsets"):
        wire.layout_from_parts(header, arrays)
