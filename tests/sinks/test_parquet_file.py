"""barsmith's Parquet writer, checked against the format's specifications and against pyarrow.

The references, named beside each check:

* Apache Parquet format specification: ``parquet.thrift`` (file layout, page headers,
  statistics and column orders) and ``Encodings.md`` (PLAIN, the RLE/bit-packed hybrid);
* pyarrow, the reference library: the same columns written by ``pyarrow.parquet`` must read
  back (pyarrow and pandas) exactly as barsmith's file does.

Page headers and the footer are decoded here by a compact-protocol reader of the tests' own
(Apache Thrift compact protocol specification), so the page layout is checked without
trusting the writer's encoder.
"""

from __future__ import annotations

import itertools
import math
import struct
import zlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from barsmith._version import __version__
from barsmith.errors import ConfigError, SinkError
from barsmith.sinks.parquet_file import CODECS, MAX_STAT_BYTES, Field, ParquetFileWriter, _def_levels

ARROW_TYPES = {
    "string": pa.string(),
    "binary": pa.binary(),
    "timestamp": pa.timestamp("ns", tz="UTC"),
    "float64": pa.float64(),
    "int64": pa.int64(),
    "bool": pa.bool_(),
}
CODEC_NAMES = {"none": "UNCOMPRESSED", "snappy": "SNAPPY", "gzip": "GZIP", "zstd": "ZSTD"}
INT64 = st.integers(-(2**63), 2**63 - 1)


def arrow_schema(fields: Sequence[Field]) -> pa.Schema:
    return pa.schema([pa.field(f.name, ARROW_TYPES[f.kind], nullable=f.nullable) for f in fields])


def write_both(
    tmp_path: Path, fields: Sequence[Field], chunks: Sequence[Sequence[Sequence[Any]]], codec: str, **options: Any
) -> tuple[Path, Path]:
    """The same row groups written by barsmith and by pyarrow (the reference)."""
    ours, theirs = tmp_path / "ours.parquet", tmp_path / "pyarrow.parquet"
    writer = ParquetFileWriter(ours, fields, codec, **options)
    schema = arrow_schema(fields)
    reference = pq.ParquetWriter(theirs, schema, compression=codec)
    for columns in chunks:
        writer.write_row_group(columns)
        if columns and len(columns[0]):  # barsmith writes no row group for no rows
            arrays = [pa.array(list(col), type=ARROW_TYPES[f.kind]) for f, col in zip(fields, columns, strict=True)]
            reference.write_table(pa.Table.from_arrays(arrays, schema=schema))
    writer.close()
    reference.close()
    return ours, theirs


def same_value(a: Any, b: Any) -> bool:
    """Equal, with floats compared bit for bit (NaN equals NaN, -0.0 is not 0.0)."""
    if isinstance(a, float) and isinstance(b, float):
        return struct.pack("<d", a) == struct.pack("<d", b)
    return bool(a == b) and type(a) is type(b)


def assert_same_columns(table: pa.Table, fields: Sequence[Field], columns: Sequence[Sequence[Any]]) -> None:
    for field, values in zip(fields, columns, strict=True):
        column = table.column(field.name)
        read = (column.cast(pa.int64()) if field.kind == "timestamp" else column).to_pylist()
        assert len(read) == len(values)
        for i, (got, want) in enumerate(zip(read, values, strict=True)):
            assert same_value(got, want), (field, i, got, want)


# -- a compact-protocol reader of the tests' own, for page headers -----------------------------


def read_struct(data: bytes, pos: int) -> tuple[dict[int, Any], int]:
    """One compact-protocol struct at ``pos``: {field id: value}, and the end position."""

    def varint(p: int) -> tuple[int, int]:
        shift = value = 0
        while True:
            byte = data[p]
            p += 1
            value |= (byte & 0x7F) << shift
            shift += 7
            if not byte & 0x80:
                return value, p

    def value_at(kind: int, p: int) -> tuple[Any, int]:
        if kind in (1, 2):
            return kind == 1, p
        if kind in (4, 5, 6):
            raw, p = varint(p)
            return (raw >> 1) ^ -(raw & 1), p
        if kind == 8:
            size, p = varint(p)
            return data[p : p + size], p + size
        if kind == 9:
            head = data[p]
            size, element, p = head >> 4, head & 0x0F, p + 1
            if size == 15:
                size, p = varint(p)
            items = []
            for _ in range(size):
                item, p = value_at(element, p)
                items.append(item)
            return items, p
        if kind == 12:
            return read_struct(data, p)
        raise AssertionError(f"unexpected compact type {kind} at {p}")

    fields: dict[int, Any] = {}
    last = 0
    while True:
        head = data[pos]
        pos += 1
        if head == 0:
            return fields, pos
        delta, kind = head >> 4, head & 0x0F
        if delta:
            field_id = last + delta
        else:
            raw, pos = varint(pos)
            field_id = (raw >> 1) ^ -(raw & 1)
        last = field_id
        fields[field_id], pos = value_at(kind, pos)


def pages_of(path: Path, row_group: int, column: int) -> list[dict[int, Any]]:
    """The page headers of one column chunk, each page's CRC checked."""
    data = path.read_bytes()
    meta = pq.ParquetFile(path).metadata.row_group(row_group).column(column)
    pos, end = meta.data_page_offset, meta.data_page_offset + meta.total_compressed_size
    headers = []
    while pos < end:
        header, pos = read_struct(data, pos)
        body = data[pos : pos + header[3]]
        # parquet.thrift PageHeader.crc: CRC-32 (the gzip polynomial) of the page as stored.
        assert header[4] & 0xFFFFFFFF == zlib.crc32(body)
        headers.append(header)
        pos += header[3]
    assert pos == end
    return headers


# -- generated tables ---------------------------------------------------------------------------

LONG = MAX_STAT_BYTES + 10  # longer than the statistics keep
VALUES: dict[str, st.SearchStrategy[Any]] = {
    "int64": INT64,
    "timestamp": INT64,
    "float64": st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from([-0.0, 0.0, math.nan, -math.inf]),
    "bool": st.booleans(),
    "string": st.text(max_size=12)
    | st.just("")
    | st.builds(lambda c: c * LONG, st.characters(codec="utf-8", exclude_categories=["Cs"])),
    "binary": st.binary(max_size=12) | st.builds(lambda b: b * LONG, st.binary(min_size=1, max_size=1)),
}


@st.composite
def tables(draw: st.DrawFn) -> tuple[list[Field], list[list[list[Any]]]]:
    """Fields, and row groups of columns: nulls nowhere, everywhere or anywhere."""
    kinds = draw(st.lists(st.sampled_from(sorted(VALUES)), min_size=1, max_size=7))
    fields = [Field(f"c{i}_{kind}" if i else "ŝymbol", kind, draw(st.booleans())) for i, kind in enumerate(kinds)]
    nulls = [draw(st.sampled_from(["none", "all", "some"])) if f.nullable else "none" for f in fields]
    sizes = draw(st.lists(st.integers(0, 30), min_size=0, max_size=6))
    chunks = []
    for size in sizes:
        columns = []
        for field, null in zip(fields, nulls, strict=True):
            value = VALUES[field.kind]
            cell = value if null == "none" else st.none() if null == "all" else st.none() | value
            columns.append(draw(st.lists(cell, min_size=size, max_size=size)))
        chunks.append(columns)
    return fields, chunks


def expected_bounds(field: Field, values: Sequence[Any]) -> tuple[Any, Any] | None:
    """parquet.thrift ColumnOrder (TYPE_ORDER): bounds of the non-null values; floats
    without NaN, a zero minimum as -0.0 and maximum as +0.0, none when all are NaN;
    byte arrays ordered unsigned byte by byte (barsmith leaves long ones out)."""
    present = [v for v in values if v is not None]
    if field.kind == "float64":
        present = [v for v in present if not math.isnan(v)]
    if not present:
        return None
    if field.kind in ("string", "binary"):
        encoded = [v.encode() if isinstance(v, str) else v for v in present]
        low, high = min(encoded), max(encoded)
        if max(len(low), len(high)) > MAX_STAT_BYTES:
            return None
        return (low.decode(), high.decode()) if field.kind == "string" else (low, high)
    low, high = min(present), max(present)
    if field.kind == "float64":
        low, high = (-0.0 if low == 0 else low), (0.0 if high == 0 else high)
    return low, high


def check_metadata(path: Path, fields: Sequence[Field], chunks: Sequence[Sequence[Sequence[Any]]], codec: str) -> None:
    """``pq.ParquetFile(...).metadata``: row groups, codec and statistics as barsmith claims."""
    meta = pq.ParquetFile(path).metadata
    groups = [c for c in chunks if c and len(c[0])]
    assert meta.num_row_groups == len(groups)
    assert meta.num_rows == sum(len(c[0]) for c in groups)
    assert meta.created_by == f"barsmith version {__version__}"
    for g, columns in enumerate(groups):
        group = meta.row_group(g)
        assert group.num_rows == len(columns[0])
        for i, (field, values) in enumerate(zip(fields, columns, strict=True)):
            chunk = group.column(i)
            assert chunk.compression == CODEC_NAMES[codec]
            assert chunk.path_in_schema == field.name
            stats = chunk.statistics
            assert stats is not None and stats.null_count == sum(v is None for v in values)
            bounds = expected_bounds(field, values)
            assert stats.has_min_max == (bounds is not None), (field, values)
            if bounds is not None:
                low, high = (stats.min_raw, stats.max_raw) if field.kind == "timestamp" else (stats.min, stats.max)
                assert same_value(low, bounds[0]) and same_value(high, bounds[1]), (field, low, high, bounds)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(
    table=tables(),
    codec=st.sampled_from(sorted(CODECS)),
    page_bytes=st.sampled_from([1, 40, 1 << 20]),
    max_rows=st.sampled_from([7, 1 << 20]),
)
def test_generated_tables_read_back_as_pyarrow_writes_them(
    tmp_path_factory: pytest.TempPathFactory,
    table: tuple[list[Field], list[list[list[Any]]]],
    codec: str,
    page_bytes: int,
    max_rows: int,
) -> None:
    fields, chunks = table
    tmp_path = tmp_path_factory.mktemp("pq")
    # Row groups split at max_rows: the reference gets them split the same way.
    split = [
        [col[s : s + max_rows] for col in columns] for columns in chunks for s in range(0, len(columns[0]), max_rows)
    ]
    ours, theirs = write_both(tmp_path, fields, split, codec, page_bytes=page_bytes)
    theirs_again = tmp_path / "again.parquet"
    ours_direct = ParquetFileWriter(theirs_again, fields, codec, page_bytes=page_bytes, max_row_group_rows=max_rows)
    for columns in chunks:
        ours_direct.write_row_group(columns)
    ours_direct.close()
    assert theirs_again.read_bytes() == ours.read_bytes()  # splitting inside the writer is the same file

    # pyarrow: the same schema (types, nullability, no metadata) and the same values.
    mine, reference = pq.read_table(ours), pq.read_table(theirs)
    assert mine.schema.equals(reference.schema, check_metadata=True), (mine.schema, reference.schema)
    assert mine.schema.equals(arrow_schema(fields))
    whole = [[v for columns in split for v in columns[i]] for i in range(len(fields))]
    assert_same_columns(mine, fields, whole)
    assert_same_columns(reference, fields, whole)
    # pandas: identical frames.
    pd.testing.assert_frame_equal(pd.read_parquet(ours), pd.read_parquet(theirs), check_exact=True)
    # The metadata barsmith claims; every page's checksum (pyarrow verifies them too).
    check_metadata(ours, fields, split, codec)
    pq.ParquetFile(ours, page_checksum_verification=True).read()
    for g in range(pq.ParquetFile(ours).metadata.num_row_groups):
        for i in range(len(fields)):
            headers = pages_of(ours, g, i)
            assert sum(h[5][1] for h in headers) == pq.ParquetFile(ours).metadata.row_group(g).num_rows
            if page_bytes == 1:  # every value gets a page of its own (booleans: eight, one byte)
                present = sum(v is not None for v in split[g][i])
                per_page = 8 if fields[i].kind == "bool" else 1
                assert len(headers) == max(1, -(-present // per_page))


def test_the_demo_feed_reads_back_as_pyarrow_writes_its_bars(tmp_path: Path) -> None:
    """The bars of the demo feed through barsmith's Parquet sink, and the same bars written by
    pyarrow: equal tables (pyarrow) and frames (pandas), claimed statistics."""
    from barsmith.bars.spec import parse_specs
    from barsmith.runner import Runner
    from barsmith.sinks.base import MemorySink
    from barsmith.sinks.parquet import REJECT_SCHEMA, ParquetBarSink, ParquetRejectSink, bar_schema
    from barsmith.sources.files import FileSource

    class BothRejects(ParquetRejectSink):
        def __init__(self, directory: Path) -> None:
            super().__init__(directory)
            self.kept: list[Any] = []

        async def write(self, rejects: Sequence[Any]) -> None:
            self.kept.extend(rejects)
            await super().write(rejects)

    demo = Path(__file__).resolve().parents[2] / "demo_feeds" / "kestrelmoor-evening.msgpack.gz"
    specs = parse_specs(["time:1m", "volume:5000@all", "notional:1e6"])
    out = tmp_path / "out"
    out.mkdir()
    memory = MemorySink()
    rejects = BothRejects(out)
    runner = Runner(specs, 2_000_000_000, FileSource([demo]), [ParquetBarSink(out, specs), memory], rejects, None)
    runner.run(event_loop=False)
    assert len(rejects.kept) == 10

    checked = [(out / "_rejects.parquet", REJECT_SCHEMA, [r.as_row() for r in rejects.kept])]
    for spec in specs:
        schema = bar_schema(spec.columns)
        bars = [bar for bar in memory.bars if bar.spec == spec.text]
        assert bars
        names = [f.name for f in schema]
        checked.append(
            (out / f"{spec.file_stem}-000001.parquet", schema, [dict(zip(names, b.values, strict=True)) for b in bars])
        )
    for path, schema, rows in checked:
        columns = [[row[f.name] for row in rows] for f in schema]
        mine = pq.read_table(path)
        reference_path = tmp_path / f"pyarrow-{path.name}"
        reference = pa.Table.from_arrays(
            [pa.array(col, type=ARROW_TYPES[f.kind]) for f, col in zip(schema, columns, strict=True)],
            schema=arrow_schema(schema),
        )
        pq.write_table(reference, reference_path, compression="zstd")
        assert mine.schema.equals(pq.read_table(reference_path).schema, check_metadata=True)
        assert_same_columns(mine, schema, columns)
        pd.testing.assert_frame_equal(pd.read_parquet(path), pd.read_parquet(reference_path), check_exact=True)
        groups = pq.ParquetFile(path).metadata
        bounds = [0]
        for g in range(groups.num_row_groups):
            bounds.append(bounds[-1] + groups.row_group(g).num_rows)
        check_metadata(path, schema, [[col[a:b] for col in columns] for a, b in itertools.pairwise(bounds)], "zstd")


# -- the encodings, byte for byte ---------------------------------------------------------------


def test_definition_levels_are_the_rle_bit_packed_hybrid() -> None:
    """Apache Parquet format spec, Encodings.md: RLE/bit-packed hybrid (bit width 1), with the
    4-byte little-endian length that data page v1 prepends to definition levels."""
    # Ten levels 1,0,1,1,0,0,0,0,1,1: one bit-packed run of two groups of eight, header
    # varint(2 << 1 | 1) = 0x05; values packed from each byte's least significant bit.
    levels = _def_levels(["a", None, "b", "c", None, None, None, None, "d", "e"])
    assert levels == b"\x03\x00\x00\x00" + b"\x05" + bytes([0b00001101, 0b00000011])
    # No null: one RLE run, header varint(10 << 1) = 0x14, the level in one byte.
    assert _def_levels(["x"] * 10) == b"\x02\x00\x00\x00\x14\x01"
    assert _def_levels([None] * 300) == b"\x03\x00\x00\x00" + bytes([0xD8, 0x04]) + b"\x00"  # varint(600)


def test_the_footer_and_pages_follow_parquet_thrift(tmp_path: Path) -> None:
    """Apache Parquet format spec, parquet.thrift: magic, footer length, data page v1 headers
    (PLAIN values, RLE levels), logical types, column orders; pyarrow reads the file."""
    fields = [Field("symbol", "string", False), Field("end", "timestamp", False), Field("px", "float64", True)]
    path = tmp_path / "f.parquet"
    writer = ParquetFileWriter(path, fields, "none")
    writer.write_row_group([["A", "B"], [1, 2], [1.5, None]])
    writer.close()
    data = path.read_bytes()
    assert data[:4] == b"PAR1" and data[-4:] == b"PAR1"
    footer_length = int.from_bytes(data[-8:-4], "little")
    meta, end = read_struct(data, len(data) - 8 - footer_length)
    assert end == len(data) - 8
    assert meta[1] == 1 and meta[3] == 2 and meta[6] == f"barsmith version {__version__}".encode()
    root, symbol, ts, px = meta[2]
    assert root == {4: b"schema", 5: 3}
    assert symbol == {1: 6, 3: 0, 4: b"symbol", 6: 0, 10: {1: {}}}  # BYTE_ARRAY, REQUIRED, UTF8, STRING
    assert ts == {1: 2, 3: 0, 4: b"end", 10: {8: {1: True, 2: {3: {}}}}}  # INT64, TIMESTAMP(UTC, NANOS)
    assert px == {1: 5, 3: 1, 4: b"px"}  # DOUBLE, OPTIONAL
    assert meta[7] == [{1: {}}] * 3  # TYPE_ORDER for each column
    (header,) = pages_of(path, 0, 2)
    assert header[1] == 0 and header[5] == {1: 2, 2: 0, 3: 3, 4: 3}  # DATA_PAGE; 2 values, PLAIN, RLE, RLE
    stats = meta[4][0][1][2][3][12]  # row group 0, column px, its ColumnMetaData's statistics
    bound = struct.pack("<d", 1.5)
    assert stats == {1: bound, 2: bound, 3: 1, 5: bound, 6: bound, 7: True, 8: True, 9: 0}
    assert pq.read_table(path).to_pylist()[1] == {
        "symbol": "B",
        "end": pd.Timestamp(2, unit="ns", tz="UTC"),
        "px": None,
    }


def test_an_empty_file_has_the_schema_and_no_row_groups(tmp_path: Path) -> None:
    fields = [Field("source", "string", True), Field("record", "binary", True), Field("flag", "bool", False)]
    ours, theirs = write_both(tmp_path, fields, [[[], [], []]], "zstd")
    assert pq.ParquetFile(ours).metadata.num_row_groups == 0
    assert pq.read_table(ours).equals(pq.read_table(theirs))
    pd.testing.assert_frame_equal(pd.read_parquet(ours), pd.read_parquet(theirs))


def test_a_column_cut_into_pages_keeps_nulls_in_place(tmp_path: Path) -> None:
    """Pages cut inside a run of nulls and inside long values: pyarrow reads the rows back in order."""
    fields = [Field("s", "string", True), Field("x", "float64", True), Field("n", "int64", False)]
    rows = 3_000
    strings = [None if i % 7 in (0, 1, 2) else "é" * (i % 50) for i in range(rows)]
    floats = [None if i % 11 == 0 else i / 3 for i in range(rows)]
    ints = list(range(rows))
    ours, _ = write_both(tmp_path, fields, [[strings, floats, ints]], "snappy", page_bytes=4_096)
    assert len(pages_of(ours, 0, 0)) > 10 and len(pages_of(ours, 0, 1)) > 3
    assert_same_columns(pq.read_table(ours), fields, [strings, floats, ints])


def test_unknown_codecs_and_bad_values_are_refused_clearly(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"Parquet compression 'lz4' is not supported; use one of gzip, none"):
        ParquetFileWriter(tmp_path / "x.parquet", [Field("a", "int64", False)], "lz4")
    writer = ParquetFileWriter(tmp_path / "y.parquet", [Field("a", "int64", False)], "zstd")
    with pytest.raises(SinkError, match="column a holds no nulls, but row 1 is null"):
        writer.write_row_group([[1, None]])
    with pytest.raises(SinkError, match="column a: "):
        writer.write_row_group([[2**63]])
    with pytest.raises(SinkError, match="2 columns given, the file has 1"):
        writer.write_row_group([[1, 2], [3]])
    writer.write_row_group([[5]])
    writer.close()
    assert pq.read_table(tmp_path / "y.parquet").column("a").to_pylist() == [5]


def test_readers_prune_row_groups_by_the_statistics(tmp_path: Path) -> None:
    """pyarrow's dataset reader skips the row groups whose statistics rule a filter out."""
    import pyarrow.dataset as ds

    fields = [Field("symbol", "string", False), Field("end", "timestamp", False), Field("px", "float64", True)]
    path = tmp_path / "bars.parquet"
    writer = ParquetFileWriter(path, fields)
    for symbol, start in (("A", 0), ("B", 100), ("C", 200)):
        writer.write_row_group([[symbol] * 3, [start, start + 1, start + 2], [1.0, math.nan, None]])
    writer.close()
    (fragment,) = ds.dataset(path).get_fragments()
    # One fragment per row group the statistics cannot rule out.
    kept = fragment.split_by_row_group(ds.field("symbol") == "B")
    assert [f.row_groups[0].id for f in kept] == [1]
    late = fragment.split_by_row_group(ds.field("end") >= pa.scalar(150, pa.timestamp("ns", tz="UTC")))
    assert [f.row_groups[0].id for f in late] == [2]
    assert [f.row_groups[0].id for f in fragment.split_by_row_group(ds.field("px") > 0.5)] == [0, 1, 2]
    assert [f.row_groups[0].id for f in fragment.split_by_row_group(ds.field("px") > 2.0)] == []
    frame = pd.read_parquet(path, filters=[("symbol", "==", "C")])
    assert frame["end"].tolist() == [pd.Timestamp(v, unit="ns", tz="UTC") for v in (200, 201, 202)]


def test_the_codecs_are_the_settings_codecs() -> None:
    """Every compression the settings accept is written; the writer refuses any other."""
    import typing

    from barsmith.settings import ParquetSettings

    assert set(typing.get_args(ParquetSettings.model_fields["compression"].annotation)) == set(CODECS)
