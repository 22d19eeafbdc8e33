"""barsmith's Parquet file writer: flat tables of Python values to Apache Parquet files.

Every Parquet file barsmith writes goes through :class:`ParquetFileWriter`; it needs no
Arrow library, so writing Parquet costs a replay no more start-up than the compressor.
What it writes, in the terms of the Parquet format specification:

* the file: ``PAR1``, the row groups' column chunks, the footer (``FileMetaData`` in
  Thrift's compact protocol, :mod:`barsmith.sinks._thrift`), its 4-byte length, ``PAR1``;
* one row group per :meth:`ParquetFileWriter.write_row_group` call (split at
  :data:`MAX_ROW_GROUP_ROWS`), one column chunk per column, data pages v1 of at most
  about :data:`PAGE_BYTES`, each with a CRC-32 of its bytes;
* values PLAIN-encoded; definition levels (nullable columns only: a flat schema has
  maximum level 1) in the RLE/bit-packed hybrid of bit width 1, one run a page —
  an RLE run when the page has no null (or only nulls), else one bit-packed run;
* statistics per column chunk: ``null_count`` always, ``min_value``/``max_value``
  (and for signed orders the older ``min``/``max``) for every column but a binary
  or string one whose bounds are longer than :data:`MAX_STAT_BYTES`; floats skip NaN,
  count it in ``nan_count``, write a zero minimum as -0.0 and a zero maximum as
  +0.0, and have no bounds when every value is NaN; ``column_orders`` says every
  column uses its type's order;
* logical types: strings are ``BYTE_ARRAY`` with ``STRING`` (converted type ``UTF8``),
  timestamps ``INT64`` with ``TIMESTAMP(isAdjustedToUTC=true, NANOS)``.

The file is written as it goes: only the footer's metadata stays in memory until
:meth:`ParquetFileWriter.close`.
"""

from __future__ import annotations

import array
import bisect
import itertools
import struct
import sys
import zlib
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO, Final

from barsmith._version import __version__
from barsmith.errors import ConfigError, SinkError
from barsmith.sinks._thrift import CompactWriter, varint

MAGIC: Final = b"PAR1"
CREATED_BY: Final = f"barsmith version {__version__}"
PAGE_BYTES: Final = 1 << 20
"""A data page is cut once its values reach this many bytes (before compression)."""
MAX_ROW_GROUP_ROWS: Final = 1 << 20
"""A longer write becomes several row groups of this many rows."""
MAX_STAT_BYTES: Final = 4_096
"""String and binary bounds longer than this are left out of the statistics."""

KINDS: Final = frozenset({"string", "binary", "timestamp", "float64", "int64", "bool"})

# Parquet enums (parquet.thrift): physical types, repetition, converted types,
# encodings, codecs, page types.
_BOOLEAN, _INT64, _DOUBLE, _BYTE_ARRAY = 0, 2, 5, 6
_REQUIRED, _OPTIONAL = 0, 1
_UTF8 = 0
_PLAIN, _RLE = 0, 3
_DATA_PAGE = 0
_PHYSICAL: Final = {
    "string": _BYTE_ARRAY,
    "binary": _BYTE_ARRAY,
    "timestamp": _INT64,
    "float64": _DOUBLE,
    "int64": _INT64,
    "bool": _BOOLEAN,
}
# Orders where the older min/max fields (signed comparison) mean the same as min_value/max_value.
_SIGNED_ORDER: Final = frozenset({"timestamp", "float64", "int64", "bool"})

_Compress = Callable[[bytes], bytes]


def _zstd(data: bytes) -> bytes:
    import cramjam

    return bytes(cramjam.zstd.compress(data, level=3))


def _snappy(data: bytes) -> bytes:
    import cramjam

    return bytes(cramjam.snappy.compress_raw(data))  # the raw block format, no framing


def _gzip(data: bytes) -> bytes:
    import cramjam

    return bytes(cramjam.gzip.compress(data, level=6))


def _uncompressed(data: bytes) -> bytes:
    return data


# Setting value → (CompressionCodec, compressor).
CODECS: Final[Mapping[str, tuple[int, _Compress]]] = {
    "none": (0, _uncompressed),
    "snappy": (1, _snappy),
    "gzip": (2, _gzip),
    "zstd": (6, _zstd),
}


def check_compression(name: str) -> str:
    """``name`` if barsmith writes that codec, else a :class:`ConfigError` naming those it does."""
    if name not in CODECS:
        raise ConfigError(f"Parquet compression {name!r} is not supported; use one of {', '.join(sorted(CODECS))}")
    return name


@dataclass(frozen=True, slots=True)
class Field:
    """One column of a Parquet file: its name, type (one of :data:`KINDS`) and whether
    it may hold nulls."""

    name: str
    kind: str
    nullable: bool

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"column {self.name}: unknown type {self.kind!r}")


# The writer's own records are plain slotted classes: a dataclass costs start-up time
# (about 1.4 ms each to create), and replay imports this module.
class _Stats:
    __slots__ = ("max_value", "min_value", "nan_count", "null_count")

    def __init__(
        self,
        null_count: int,
        min_value: bytes | None = None,
        max_value: bytes | None = None,
        nan_count: int | None = None,
    ) -> None:
        self.null_count = null_count
        self.min_value = min_value
        self.max_value = max_value
        self.nan_count = nan_count


class _ChunkMeta:
    """What the footer says of one column chunk."""

    __slots__ = ("compressed", "num_values", "offset", "pages", "stats", "uncompressed")

    def __init__(
        self, offset: int, num_values: int, pages: int, uncompressed: int, compressed: int, stats: _Stats
    ) -> None:
        self.offset = offset  # of its first page
        self.num_values = num_values
        self.pages = pages
        self.uncompressed = uncompressed  # bytes, page headers included
        self.compressed = compressed
        self.stats = stats


class _RowGroupMeta:
    __slots__ = ("chunks", "num_rows")

    def __init__(self, num_rows: int, chunks: tuple[_ChunkMeta, ...]) -> None:
        self.num_rows = num_rows
        self.chunks = chunks


class ParquetFileWriter:
    """A Parquet file at ``path`` with the columns ``fields``, written one row group at a
    time: :meth:`write_row_group` for each, then :meth:`close` for the footer.

    ``compression`` is one of :data:`CODECS`; ``metadata`` is the file's key/value
    metadata; ``page_bytes`` and ``max_row_group_rows`` bound pages and row groups (see
    :data:`PAGE_BYTES`, :data:`MAX_ROW_GROUP_ROWS`). Until :meth:`close` the file is no
    valid Parquet file (it has no footer).
    """

    def __init__(
        self,
        path: Path,
        fields: Sequence[Field],
        compression: str = "zstd",
        metadata: Mapping[str, str] | None = None,
        *,
        page_bytes: int = PAGE_BYTES,
        max_row_group_rows: int = MAX_ROW_GROUP_ROWS,
    ) -> None:
        if page_bytes < 1 or max_row_group_rows < 1:
            raise ValueError("page_bytes and max_row_group_rows must be positive")
        self.path = path
        self._page_bytes = page_bytes
        self._max_row_group_rows = max_row_group_rows
        self.fields = tuple(fields)
        if len({f.name for f in self.fields}) != len(self.fields):
            raise ValueError(f"repeated column names in {[f.name for f in self.fields]}")
        self._codec, self._compress = CODECS[check_compression(compression)]
        self._metadata = dict(metadata or {})
        self._row_groups: list[_RowGroupMeta] = []
        self._handle: BinaryIO | None = path.open("wb")
        self._handle.write(MAGIC)
        self._offset = len(MAGIC)
        self.rows = 0

    def write_row_group(self, columns: Sequence[Sequence[Any]]) -> None:
        """One row group (more for over ``max_row_group_rows`` rows) holding
        ``columns``: one sequence of Python values per field, ``None`` for null. No rows:
        nothing is written."""
        if len(columns) != len(self.fields):
            raise SinkError(f"{self.path.name}: {len(columns)} columns given, the file has {len(self.fields)}")
        rows = len(columns[0]) if columns else 0
        for field, values in zip(self.fields, columns, strict=True):
            if len(values) != rows:
                raise SinkError(f"{self.path.name}: column {field.name} has {len(values)} values, not {rows}")
        for start in range(0, rows, self._max_row_group_rows):
            stop = min(rows, start + self._max_row_group_rows)
            whole = start == 0 and stop == rows
            self._row_group([values if whole else values[start:stop] for values in columns], stop - start)

    def _row_group(self, columns: Sequence[Sequence[Any]], rows: int) -> None:
        handle = self._open_handle()
        chunks = []
        for field, values in zip(self.fields, columns, strict=True):
            pages, stats = _encode_column(field, values, self._page_bytes)
            start, uncompressed, compressed = self._offset, 0, 0
            for body, num_values in pages:
                packed = self._compress(body)
                header = _page_header(len(body), packed, num_values)
                handle.write(header)
                handle.write(packed)
                uncompressed += len(header) + len(body)
                compressed += len(header) + len(packed)
            self._offset += compressed
            chunks.append(_ChunkMeta(start, rows, len(pages), uncompressed, compressed, stats))
        self._row_groups.append(_RowGroupMeta(rows, tuple(chunks)))
        self.rows += rows

    def _open_handle(self) -> BinaryIO:
        if self._handle is None:
            raise SinkError(f"{self.path} is already closed")
        return self._handle

    def close(self) -> None:
        """Write the footer and close the file (again: nothing)."""
        if self._handle is None:
            return
        handle, self._handle = self._handle, None
        with handle:
            footer = self._footer()
            handle.write(footer)
            handle.write(len(footer).to_bytes(4, "little"))
            handle.write(MAGIC)

    def _footer(self) -> bytes:
        w = CompactWriter()
        w.i32(1, 1)  # version: 1, as the format asks of writers
        w.struct_list(2, 1 + len(self.fields))  # schema: the root, then the columns
        w.element()
        w.string(4, "schema")
        w.i32(5, len(self.fields))
        w.end()
        for field in self.fields:
            _schema_element(w, field)
        w.i64(3, self.rows)
        w.struct_list(4, len(self._row_groups))
        for ordinal, group in enumerate(self._row_groups):
            self._row_group_meta(w, group, ordinal)
        if self._metadata:
            w.struct_list(5, len(self._metadata))
            for key, value in self._metadata.items():
                w.element()
                w.string(1, key)
                w.string(2, value)
                w.end()
        w.string(6, CREATED_BY)
        w.struct_list(7, len(self.fields))  # column_orders: each column's type order
        for _ in self.fields:
            w.element()
            w.empty(1)  # TYPE_ORDER
            w.end()
        return w.finish()

    def _row_group_meta(self, w: CompactWriter, group: _RowGroupMeta, ordinal: int) -> None:
        w.element()
        w.struct_list(1, len(group.chunks))
        for field, chunk in zip(self.fields, group.chunks, strict=True):
            w.element()
            w.i64(2, 0)  # file_offset: no column metadata outside the footer
            w.begin(3)  # ColumnMetaData
            w.i32(1, _PHYSICAL[field.kind])
            w.i32_list(2, [_PLAIN, _RLE])
            w.string_list(3, [field.name])
            w.i32(4, self._codec)
            w.i64(5, chunk.num_values)
            w.i64(6, chunk.uncompressed)
            w.i64(7, chunk.compressed)
            w.i64(9, chunk.offset)  # data_page_offset
            _statistics(w, 12, field, chunk.stats)
            w.struct_list(13, 1)  # encoding_stats: every page a PLAIN data page
            w.element()
            w.i32(1, _DATA_PAGE)
            w.i32(2, _PLAIN)
            w.i32(3, chunk.pages)
            w.end()
            w.end()
            w.end()
        w.i64(2, sum(c.uncompressed for c in group.chunks))
        w.i64(3, group.num_rows)
        if group.chunks:
            w.i64(5, group.chunks[0].offset)
        w.i64(6, sum(c.compressed for c in group.chunks))
        if ordinal < 1 << 15:
            w.i16(7, ordinal)
        w.end()


def _schema_element(w: CompactWriter, field: Field) -> None:
    w.element()
    w.i32(1, _PHYSICAL[field.kind])
    w.i32(3, _OPTIONAL if field.nullable else _REQUIRED)
    w.string(4, field.name)
    if field.kind == "string":
        w.i32(6, _UTF8)
        w.begin(10)  # logicalType
        w.empty(1)  # STRING
        w.end()
    elif field.kind == "timestamp":
        w.begin(10)  # logicalType
        w.begin(8)  # TIMESTAMP
        w.boolean(1, True)  # isAdjustedToUTC
        w.begin(2)  # unit
        w.empty(3)  # NANOS
        w.end()
        w.end()
        w.end()
    w.end()


def _statistics(w: CompactWriter, field_id: int, field: Field, stats: _Stats) -> None:
    w.begin(field_id)
    bounds = stats.min_value is not None and stats.max_value is not None
    if bounds and field.kind in _SIGNED_ORDER:
        assert stats.min_value is not None and stats.max_value is not None
        w.binary(1, stats.max_value)  # max
        w.binary(2, stats.min_value)  # min
    w.i64(3, stats.null_count)
    if bounds:
        assert stats.min_value is not None and stats.max_value is not None
        w.binary(5, stats.max_value)
        w.binary(6, stats.min_value)
        w.boolean(7, True)  # is_max_value_exact
        w.boolean(8, True)  # is_min_value_exact
    if stats.nan_count is not None:
        w.i64(9, stats.nan_count)
    w.end()


def _page_header(uncompressed: int, packed: bytes, num_values: int) -> bytes:
    w = CompactWriter()
    w.i32(1, _DATA_PAGE)
    w.i32(2, uncompressed)
    w.i32(3, len(packed))
    crc = zlib.crc32(packed)  # CRC-32 of the page as stored, after compression
    w.i32(4, crc - (1 << 32) if crc >= 1 << 31 else crc)  # a Thrift i32 is signed
    w.begin(5)  # DataPageHeader
    w.i32(1, num_values)
    w.i32(2, _PLAIN)
    w.i32(3, _RLE)  # definition levels
    w.i32(4, _RLE)  # repetition levels (a flat schema has none)
    w.end()
    return w.finish()


# -- encoding a column -------------------------------------------------------------------

_LITTLE: Final = sys.byteorder == "little"
_Q: Final = struct.Struct("<q")
_D: Final = struct.Struct("<d")


def _encode_column(field: Field, values: Sequence[Any], page_bytes: int) -> tuple[list[tuple[bytes, int]], _Stats]:
    """The column's data pages (uncompressed bytes, number of values) and statistics."""
    rows = len(values)
    nulls = 0
    present: Sequence[Any] = values
    if field.nullable:
        present = [v for v in values if v is not None]
        nulls = rows - len(present)
        if not nulls:
            present = values
    elif None in values:
        raise SinkError(f"column {field.name} holds no nulls, but row {list(values).index(None)} is null")
    kind = field.kind
    if kind in ("string", "binary"):
        try:
            encoded = [v.encode("utf-8") for v in present] if kind == "string" else [bytes(v) for v in present]
        except (AttributeError, TypeError, UnicodeError) as exc:
            raise SinkError(f"column {field.name}: {exc}") from exc
        plain = _plain_byte_arrays
        stats = _byte_array_stats(encoded, nulls)
        data: Sequence[Any] = encoded
        sizes: Sequence[int] | None = [4 + len(e) for e in encoded]
    else:
        try:
            if kind == "bool":
                data, plain, stats, sizes = present, _plain_bools, _bool_stats(present, nulls), None
            elif kind == "float64":
                data = array.array("d", present)
                plain, stats, sizes = _plain_fixed, _float_stats(data, nulls), None
            else:
                data = array.array("q", present)
                plain, stats, sizes = _plain_fixed, _int_stats(data, nulls), None
        except (TypeError, OverflowError) as exc:
            raise SinkError(f"column {field.name}: {exc}") from exc
    pages = []
    for lo, hi, vlo, vhi in _page_bounds(values if nulls else None, rows, kind, sizes, page_bytes):
        levels = _def_levels(values[lo:hi]) if field.nullable else b""
        pages.append((levels + plain(data[vlo:vhi]), hi - lo))
    return pages, stats


def _page_bounds(
    values: Sequence[Any] | None, rows: int, kind: str, sizes: Sequence[int] | None, page_bytes: int
) -> list[tuple[int, int, int, int]]:
    """Pages as (first row, end row, first value, end value): rows cut so that a page's
    values stay within ``page_bytes`` (a longer single value has a page of its own).
    ``values`` is given only when some are null (the values of a page are then the
    non-null ones among its rows)."""
    if sizes is None:
        width = 8 if kind != "bool" else 1 / 8
        per_page = max(1, int(page_bytes / width))
        count = rows if values is None else sum(v is not None for v in values)
        value_cuts = [*range(0, count, per_page), count]
    else:
        total = list(itertools.accumulate(sizes, initial=0))
        value_cuts = [0]
        while value_cuts[-1] < len(sizes):
            start = value_cuts[-1]
            end = bisect.bisect_right(total, total[start] + page_bytes) - 1
            value_cuts.append(max(end, start + 1))
    if len(value_cuts) <= 2:
        return [(0, rows, 0, value_cuts[-1])]
    if values is None:
        return [(a, b, a, b) for a, b in itertools.pairwise(value_cuts)]
    # Rows of page k: from the row of its first value; nulls after a page's last value
    # stay in that page (and a column of nulls alone is one page).
    row_of = [i for i, v in enumerate(values) if v is not None]
    row_cuts = [0] + [row_of[c] for c in value_cuts[1:-1]] + [rows]
    return [(row_cuts[k], row_cuts[k + 1], value_cuts[k], value_cuts[k + 1]) for k in range(len(value_cuts) - 1)]


def _def_levels(values: Sequence[Any]) -> bytes:
    """Definition levels of a page of a nullable column (1: a value, 0: null), in the
    RLE/bit-packed hybrid with bit width 1, prefixed with their length (data page v1)."""
    count = len(values)
    digits = "".join(["0" if v is None else "1" for v in reversed(values)])
    ones = digits.count("1")
    if ones in (0, count):  # one RLE run: header, then the level in one byte
        run = varint(count << 1) + (b"\x01" if ones else b"\x00")
    else:  # one bit-packed run of ceil(count / 8) groups of eight levels
        groups = (count + 7) // 8
        run = varint(groups << 1 | 1) + _bitmap(digits, groups)
    return len(run).to_bytes(4, "little") + run


def _bitmap(digits: str, size: int) -> bytes:
    # ``digits`` holds the last value's bit first: read as one binary number, value i
    # is bit i, so its little-endian bytes hold value 0 in the first byte's lowest bit
    # (the hybrid's bit-packing order, least significant bit first).
    return int(digits or "0", 2).to_bytes(size, "little")


def _plain_fixed(data: Sequence[Any]) -> bytes:
    assert isinstance(data, array.array)
    if not _LITTLE:
        data = array.array(data.typecode, data)
        data.byteswap()
    return data.tobytes()


def _plain_bools(data: Sequence[Any]) -> bytes:
    return _bitmap("".join(["1" if v else "0" for v in reversed(data)]), (len(data) + 7) // 8)


def _plain_byte_arrays(data: Sequence[Any]) -> bytes:
    return b"".join([part for value in data for part in (len(value).to_bytes(4, "little"), value)])


def _int_stats(data: array.array[int], nulls: int) -> _Stats:
    if not data:
        return _Stats(nulls)
    return _Stats(nulls, _Q.pack(min(data)), _Q.pack(max(data)))


def _float_stats(data: array.array[float], nulls: int) -> _Stats:
    numbers = [v for v in data if v == v]  # NaN alone is not equal to itself
    nans = len(data) - len(numbers)
    if not numbers:
        return _Stats(nulls, nan_count=nans)
    low, high = min(numbers), max(numbers)
    # A zero bound is written as -0.0 (minimum) and +0.0 (maximum): either zero may be there.
    low, high = (-0.0 if low == 0 else low), (0.0 if high == 0 else high)
    return _Stats(nulls, _D.pack(low), _D.pack(high), nans)


def _bool_stats(data: Sequence[Any], nulls: int) -> _Stats:
    if not data:
        return _Stats(nulls)
    flags = [bool(v) for v in data]
    return _Stats(nulls, b"\x01" if min(flags) else b"\x00", b"\x01" if max(flags) else b"\x00")


def _byte_array_stats(encoded: list[bytes], nulls: int) -> _Stats:
    if not encoded:
        return _Stats(nulls)
    low, high = min(encoded), max(encoded)  # bytes compare unsigned, byte by byte: the type's order
    if len(low) > MAX_STAT_BYTES or len(high) > MAX_STAT_BYTES:
        return _Stats(nulls)
    return _Stats(nulls, low, high)
