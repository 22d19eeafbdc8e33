"""The Thrift compact protocol writer that encodes Parquet page headers and footers,
checked byte for byte against the Apache Thrift compact protocol specification
(``thrift-compact-protocol.md``)."""

from __future__ import annotations

from barsmith.sinks import _thrift


def test_thrift_compact_protocol_encoding() -> None:
    """Apache Thrift compact protocol spec: zigzag ints, ULEB128 varints, field headers
    (short form for deltas 1..15, else type then zigzag id), booleans in the header, lists."""
    assert [_thrift.zigzag(v) for v in (0, -1, 1, -2, 2, -(2**63), 2**63 - 1)] == [0, 1, 2, 3, 4, 2**64 - 1, 2**64 - 2]
    assert _thrift.varint(50399) == b"\xdf\x89\x03"  # the specification's example
    w = _thrift.CompactWriter()
    w.i32(1, -3)  # delta 1, type 5: 0x15, zigzag(-3) = 5
    w.boolean(2, True)  # delta 1, BOOLEAN_TRUE: 0x11
    w.i64(20, 1)  # delta 18 > 15: long form, 0x06 then zigzag(20) = 40
    w.string_list(21, ["a"] * 15)  # 15 elements: long list header 0xF8, varint 15
    w.begin(22)
    w.i16(1, 7)
    w.end()
    assert w.finish() == (
        b"\x15\x05" + b"\x11" + b"\x06\x28\x02" + b"\x19\xf8\x0f" + b"\x01a" * 15 + b"\x1c" + b"\x14\x0e\x00" + b"\x00"
    )
