"""Writing Apache Thrift's compact protocol: the encoding of a Parquet file's page
headers and footer.

Only what barsmith's Parquet files need is here: structs (and unions, which are
structs with one field set), i32/i64/i16 fields, booleans, binary and string
fields, and lists of i32, strings and structs. Each struct is written in
increasing field-id order, so a field header is one byte whenever the id grows by
1 to 15 (the compact protocol's short form).
"""

from __future__ import annotations

from typing import Final

# Field types of the compact protocol (its field headers and list headers).
BOOL_TRUE: Final = 1
BOOL_FALSE: Final = 2
I16: Final = 4
I32: Final = 5
I64: Final = 6
BINARY: Final = 8
LIST: Final = 9
STRUCT: Final = 12

_STOP: Final = 0


def zigzag(value: int) -> int:
    """A signed integer folded onto the unsigned ones: 0, -1, 1, -2, … → 0, 1, 2, 3, …"""
    return value << 1 if value >= 0 else ((-value) << 1) - 1


def varint(value: int) -> bytes:
    """``value`` (unsigned) as ULEB128: seven bits a byte, least significant first."""
    out = bytearray()
    while value > 0x7F:
        out.append((value & 0x7F) | 0x80)
        value >>= 7
    out.append(value)
    return bytes(out)


class CompactWriter:
    """Builds one Thrift struct in the compact protocol, field by field, until
    :meth:`finish`.

    ``begin(id)`` … ``end()`` brackets a nested struct; ``element()`` … ``end()`` a
    struct inside a list opened by ``struct_list``. The caller writes each struct's
    fields in increasing id order.
    """

    __slots__ = ("_last", "_outer", "out")

    def __init__(self) -> None:
        self.out = bytearray()
        self._last = 0  # the id of the last field written in the current struct
        self._outer: list[int] = []  # the enclosing structs' last ids

    def finish(self) -> bytes:
        """The outermost struct's bytes, its stop field included."""
        if self._outer:
            raise ValueError("a struct is still open")
        self.out.append(_STOP)
        return bytes(self.out)

    def _field(self, field_id: int, field_type: int) -> None:
        delta = field_id - self._last
        if 0 < delta <= 15:
            self.out.append(delta << 4 | field_type)
        else:
            self.out.append(field_type)
            self.out += varint(zigzag(field_id))
        self._last = field_id

    def _integer(self, field_id: int, field_type: int, value: int) -> None:
        # i16, i32 and i64 share one encoding: a zigzag varint (only the type differs).
        self._field(field_id, field_type)
        self.out += varint(zigzag(value))

    def i16(self, field_id: int, value: int) -> None:
        self._integer(field_id, I16, value)

    def i32(self, field_id: int, value: int) -> None:
        self._integer(field_id, I32, value)

    def i64(self, field_id: int, value: int) -> None:
        self._integer(field_id, I64, value)

    def boolean(self, field_id: int, value: bool) -> None:
        self._field(field_id, BOOL_TRUE if value else BOOL_FALSE)  # the value is the type

    def binary(self, field_id: int, value: bytes) -> None:
        self._field(field_id, BINARY)
        self._bytes(value)

    def _bytes(self, value: bytes) -> None:
        """A binary value (a field's or a list element's): its length, then its bytes."""
        self.out += varint(len(value))
        self.out += value

    def string(self, field_id: int, value: str) -> None:
        self.binary(field_id, value.encode("utf-8"))

    def begin(self, field_id: int) -> None:
        """Open the struct (or union) field ``field_id``."""
        self._field(field_id, STRUCT)
        self._outer.append(self._last)
        self._last = 0

    def end(self) -> None:
        """Close the struct opened last (by :meth:`begin` or :meth:`element`)."""
        self.out.append(_STOP)
        self._last = self._outer.pop()

    def empty(self, field_id: int) -> None:
        """A struct field with no fields of its own (Parquet's marker structs)."""
        self.begin(field_id)
        self.end()

    def _list(self, field_id: int, element_type: int, size: int) -> None:
        self._field(field_id, LIST)
        if size < 15:
            self.out.append(size << 4 | element_type)
        else:
            self.out.append(0xF0 | element_type)
            self.out += varint(size)

    def i32_list(self, field_id: int, values: list[int]) -> None:
        self._list(field_id, I32, len(values))
        for value in values:
            self.out += varint(zigzag(value))

    def string_list(self, field_id: int, values: list[str]) -> None:
        self._list(field_id, BINARY, len(values))
        for value in values:
            self._bytes(value.encode("utf-8"))

    def struct_list(self, field_id: int, size: int) -> None:
        """Open a list of ``size`` structs; write each as :meth:`element` … :meth:`end`."""
        self._list(field_id, STRUCT, size)

    def element(self) -> None:
        """Open the next struct of a list opened by :meth:`struct_list`."""
        self._outer.append(self._last)
        self._last = 0
