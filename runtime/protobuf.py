"""A small, bounded decoder for the protobuf wire format, driven by per-message field tables.

It knows nothing about ONNX: `onnx_reader` supplies the tables and turns the decoded fields into
records. Every length is checked against the bytes that remain before anything is sliced.
"""

from __future__ import annotations

import struct
from array import array
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

from .errors import ModelFormatError

WIRE_VARINT, WIRE_FIXED64, WIRE_LEN, WIRE_FIXED32 = 0, 1, 2, 5
_WIRE_NAMES = {
    0: "varint", 1: "64-bit", 2: "length-delimited", 3: "group start", 4: "group end",
    5: "32-bit", 6: "reserved type 6", 7: "reserved type 7",
}
# The protobuf language caps field numbers at 2^29 - 1; larger tags can only come from damage.
_MAX_FIELD_NUMBER = (1 << 29) - 1
_VARINT_MAX_BYTES = 10
# Packed varints are decoded this many at a time so the temporaries stay small.
_VARINT_BLOCK = 1 << 20

_SCALAR_WIRE = {"int64": WIRE_VARINT, "int32": WIRE_VARINT, "float": WIRE_FIXED32,
                "double": WIRE_FIXED64}
_FIXED_DTYPES = {"float": np.dtype("<f4"), "double": np.dtype("<f8")}
_LEN_KINDS = frozenset({"string", "bytes", "message"})
_KINDS = frozenset(_SCALAR_WIRE) | _LEN_KINDS


@dataclass(frozen=True)
class FieldSpec:
    """How one field of a message is declared.

    Parameters
    ----------
    name : str
        The field's name in the .proto file; the decoded dict uses it as key.
    kind : str
        ``"int64"``, ``"int32"``, ``"float"``, ``"double"`` (scalars), ``"string"`` (UTF-8 text),
        ``"bytes"`` or ``"message"`` (both returned as an undecoded memoryview).
    repeated : bool
        Whether the field may occur many times. Repeated scalars accept packed and unpacked
        encodings, as every protobuf parser must.
    """

    name: str
    kind: str
    repeated: bool = False

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ValueError(f"`kind` must be one of {sorted(_KINDS)}, got {self.kind!r}.")


def fail(where: str, message_type: str, problem: str) -> ModelFormatError:
    """Build the error for a wire-level fault in the message at `where`."""
    return ModelFormatError(
        f"Malformed protobuf in {where} ({message_type}): {problem}; the data is truncated, "
        "corrupt or not an ONNX model."
    )


@dataclass(frozen=True)
class RepeatedScalars:
    """The occurrences of a repeated scalar field, kept undecoded until asked for.

    `count` is cheap, so callers can check an element count against their limits before
    `to_array` allocates. Pieces are memoryviews (packed payloads) or compact runs of unpacked
    values (`array('Q')` of raw varints, or `bytearray` of fixed-width little-endian values).
    """

    kind: str
    pieces: tuple[Any, ...] = ()
    where: str = ""
    message_type: str = ""
    field_name: str = ""

    def count(self) -> int:
        """Number of elements, without decoding them."""
        if self.kind in _FIXED_DTYPES:
            return sum(len(piece) for piece in self.pieces) // _FIXED_DTYPES[self.kind].itemsize
        total = 0
        for piece in self.pieces:
            if isinstance(piece, array):
                total += len(piece)
            else:
                # Every varint ends in exactly one byte whose high bit is clear.
                total += int(np.count_nonzero(np.frombuffer(piece, np.uint8) < 0x80))
        return total

    def to_array(self) -> np.ndarray:
        """Decode into a native-endian array: float32, float64, int64 or int32 by `kind`."""
        if self.kind in _FIXED_DTYPES:
            dtype = _FIXED_DTYPES[self.kind]
            if len(self.pieces) == 1:
                values = np.frombuffer(self.pieces[0], dtype)
            else:
                values = np.frombuffer(b"".join(self.pieces), dtype)
            return values if dtype.isnative else values.astype(dtype.newbyteorder("="))
        chunks = [
            np.frombuffer(piece, np.uint64) if isinstance(piece, array)
            else self._decode_packed(piece)
            for piece in self.pieces
        ]
        raw = chunks[0] if len(chunks) == 1 else np.concatenate(chunks or [np.empty(0, np.uint64)])
        if self.kind == "int64":
            return raw.view(np.int64)
        # protobuf keeps the low 32 bits of an int32 (negatives travel sign-extended to 64).
        return raw.astype(np.uint32).view(np.int32)

    def _decode_packed(self, payload: memoryview) -> np.ndarray:
        octets = np.frombuffer(payload, np.uint8)
        ends = np.flatnonzero(octets < 0x80)
        if octets.size and (ends.size == 0 or ends[-1] != octets.size - 1):
            raise fail(self.where, self.message_type,
                       f"packed field {self.field_name} ends inside a varint")
        values = np.empty(ends.size, np.uint64)
        for first in range(0, ends.size, _VARINT_BLOCK):
            block_ends = ends[first:first + _VARINT_BLOCK]
            start = 0 if first == 0 else int(ends[first - 1]) + 1
            values[first:first + block_ends.size] = self._decode_block(
                octets[start:int(block_ends[-1]) + 1], block_ends - start
            )
        return values

    def _decode_block(self, octets: np.ndarray, ends: np.ndarray) -> np.ndarray:
        starts = np.concatenate(([0], ends[:-1] + 1))
        lengths = ends - starts + 1
        longest = int(lengths.max())
        if longest == 1:
            return octets.astype(np.uint64)
        if longest > _VARINT_MAX_BYTES:
            raise fail(self.where, self.message_type,
                       f"packed field {self.field_name} holds a varint longer than "
                       f"{_VARINT_MAX_BYTES} bytes")
        # A 10th byte may only carry bit 63; anything more is a value of 2^64 or larger.
        if np.any(octets[ends[lengths == _VARINT_MAX_BYTES]] > 1):
            raise fail(self.where, self.message_type,
                       f"packed field {self.field_name} holds a varint of 2^64 or more")
        position = np.arange(octets.size) - np.repeat(starts, lengths)
        parts = (octets & 0x7F).astype(np.uint64) << (7 * position).astype(np.uint64)
        # The 7-bit groups never overlap, so summing them is the same as OR-ing them.
        return np.add.reduceat(parts, starts)


@dataclass(frozen=True)
class MessageSchema:
    """A message type: its name (for error messages) and its declared fields by number."""

    name: str
    fields: Mapping[int, FieldSpec]
    # Derived once here rather than on every message read.
    lists: tuple[str, ...] = field(init=False)
    empty_scalars: Mapping[str, RepeatedScalars] = field(init=False)

    def __post_init__(self) -> None:
        for number in self.fields:
            if not 1 <= number <= _MAX_FIELD_NUMBER:
                raise ValueError(f"Field numbers must lie in 1..{_MAX_FIELD_NUMBER}, got "
                                 f"{number}.")
        repeated = [spec for spec in self.fields.values() if spec.repeated]
        object.__setattr__(self, "lists", tuple(
            spec.name for spec in repeated if spec.kind in _LEN_KINDS))
        object.__setattr__(self, "empty_scalars", MappingProxyType({
            spec.name: RepeatedScalars(spec.kind) for spec in repeated
            if spec.kind not in _LEN_KINDS}))


class _RepeatedBuilder:
    """Collects the occurrences of one repeated scalar field while a message is read."""

    def __init__(self, kind: str) -> None:
        self.kind = kind
        self.pieces: list[Any] = []

    def add_packed(self, payload: memoryview) -> None:
        self.pieces.append(payload)

    def add_varint(self, value: int) -> None:
        if not self.pieces or not isinstance(self.pieces[-1], array):
            self.pieces.append(array("Q"))
        self.pieces[-1].append(value)

    def add_fixed(self, octets: memoryview) -> None:
        if not self.pieces or not isinstance(self.pieces[-1], bytearray):
            self.pieces.append(bytearray())
        self.pieces[-1] += octets


def read_varint(view: memoryview, pos: int, where: str, message_type: str) -> tuple[int, int]:
    """Decode the varint at `pos`; return its unsigned value and the position after it."""
    end = len(view)
    if pos >= end:
        raise fail(where, message_type, f"the data ends inside a varint at byte {pos}")
    octet = view[pos]
    if octet < 0x80:
        return octet, pos + 1
    start = pos
    value = octet & 0x7F
    shift = 7
    pos += 1
    while True:
        if pos >= end:
            raise fail(where, message_type, f"the data ends inside a varint at byte {start}")
        if shift >= 7 * _VARINT_MAX_BYTES:
            raise fail(where, message_type,
                       f"varint at byte {start} is longer than {_VARINT_MAX_BYTES} bytes")
        octet = view[pos]
        pos += 1
        value |= (octet & 0x7F) << shift
        if octet < 0x80:
            break
        shift += 7
    if value >> 64:
        raise fail(where, message_type, f"varint at byte {start} is 2^64 or larger")
    return value, pos


def _read_length(view: memoryview, pos: int, where: str, message_type: str,
                 field_number: int) -> tuple[int, int]:
    length, pos = read_varint(view, pos, where, message_type)
    remaining = len(view) - pos
    if length > remaining:
        raise fail(where, message_type,
                   f"field {field_number} declares {length} bytes but only {remaining} remain")
    return pos, pos + length


def _to_signed(value: int, bits: int) -> int:
    value &= (1 << bits) - 1
    return value - (1 << bits) if value >> (bits - 1) else value


def read_message(view: memoryview, schema: MessageSchema, *, where: str, depth: int,
                 max_depth: int, max_items: int) -> dict[str, Any]:
    """Decode one message's fields by `schema`, skipping fields the schema does not declare.

    Parameters
    ----------
    view : memoryview
        The message's bytes (the whole buffer, or a length-delimited payload).
    schema : MessageSchema
        The message type's name and declared fields.
    where : str
        Location used in error messages, e.g. ``"model > graph > node[3]"``.
    depth : int
        Nesting depth of this message (the outermost message is 1). Unknown length-delimited
        fields are skipped, not decoded, but still count as one level deeper.
    max_depth : int
        The largest depth accepted (`Limits.max_protobuf_depth`).
    max_items : int
        The most occurrences a repeated string, bytes or message field may have
        (`Limits.max_graph_nodes`). Each becomes a Python object many times larger than its
        few wire bytes, so this bounds memory; repeated scalars are bounded by their callers
        through `RepeatedScalars.count`.

    Returns
    -------
    dict
        Field name to value. Singular fields appear only when present (last occurrence wins for
        scalars, as in protobuf). Repeated scalars are always present as `RepeatedScalars`;
        other repeated fields are always present as lists. Strings are `str`; bytes and
        messages are memoryviews into `view`.
    """
    message_type = schema.name
    if depth > max_depth:
        raise ModelFormatError(
            f"{where} ({message_type}) is nested {depth} messages deep; the limit "
            f"`max_protobuf_depth` is {max_depth}."
        )
    fields: dict[str, Any] = {name: [] for name in schema.lists}
    fields.update(schema.empty_scalars)
    builders: dict[str, _RepeatedBuilder] = {}
    specs = schema.fields
    pos, end = 0, len(view)
    while pos < end:
        # Tags and lengths below 128 take one byte: by far the common case, so inline it.
        tag = view[pos]
        if tag < 0x80:
            pos += 1
        else:
            tag, pos = read_varint(view, pos, where, message_type)
        number, wire = tag >> 3, tag & 7
        spec = specs.get(number)
        if spec is None:
            if number == 0 or number > _MAX_FIELD_NUMBER:
                raise fail(where, message_type,
                           f"field number {number} is outside 1..{_MAX_FIELD_NUMBER}")
            pos = _skip(view, pos, number, wire, where, message_type, depth, max_depth)
        elif wire == WIRE_LEN and spec.kind in _LEN_KINDS:
            if pos < end and view[pos] < 0x80 and pos + 1 + view[pos] <= end:
                start, pos = pos + 1, pos + 1 + view[pos]
            else:
                start, pos = _read_length(view, pos, where, message_type, number)
            value: Any = view[start:pos]
            if spec.kind == "string":
                value = _decode_utf8(value, spec, number, where, message_type)
            _store(fields, spec, number, value, where, message_type, max_items)
        else:
            pos = _read_scalar(view, pos, number, wire, spec, fields, builders, where,
                               message_type)
    for name, builder in builders.items():
        fields[name] = RepeatedScalars(builder.kind, tuple(builder.pieces), where,
                                       message_type, name)
    return fields


def _store(fields: dict[str, Any], spec: FieldSpec, number: int, value: Any, where: str,
           message_type: str, max_items: int) -> None:
    if spec.repeated:
        items = fields[spec.name]
        if len(items) >= max_items:
            raise ModelFormatError(
                f"Field {spec.name} ({number}) of {where} ({message_type}) occurs more than "
                f"{max_items} times; repeated fields are limited by `max_graph_nodes`, which "
                f"is {max_items}."
            )
        items.append(value)
    elif spec.kind == "message" and spec.name in fields:
        # protobuf would merge the two copies; no ONNX writer emits that, so refuse it.
        raise fail(where, message_type,
                   f"singular message field {spec.name} ({number}) occurs more than once")
    else:
        fields[spec.name] = value


def _read_scalar(view: memoryview, pos: int, number: int, wire: int, spec: FieldSpec,
                 fields: dict[str, Any], builders: dict[str, _RepeatedBuilder],
                 where: str, message_type: str) -> int:
    """Read a numeric field (or a packed run of one); return the position after it."""
    kind = spec.kind
    expected = _SCALAR_WIRE.get(kind, WIRE_LEN)
    packed = wire == WIRE_LEN and spec.repeated and kind not in _LEN_KINDS
    if wire != expected and not packed:
        raise fail(where, message_type,
                   f"field {spec.name} ({number}) arrives as wire type {wire} "
                   f"({_WIRE_NAMES[wire]}) but is declared {kind}, wire type {expected}")
    builder = builders.get(spec.name)
    if spec.repeated and builder is None:
        builder = builders[spec.name] = _RepeatedBuilder(kind)
    if packed:
        start, pos = _read_length(view, pos, where, message_type, number)
        payload = view[start:pos]
        width = _FIXED_DTYPES[kind].itemsize if kind in _FIXED_DTYPES else 0
        if width and len(payload) % width:
            raise fail(where, message_type, f"packed field {spec.name} ({number}) holds "
                       f"{len(payload)} bytes, not a multiple of {width}")
        if not width and len(payload) and payload[-1] >= 0x80:
            raise fail(where, message_type,
                       f"packed field {spec.name} ({number}) ends inside a varint")
        builder.add_packed(payload)
        return pos
    if expected == WIRE_VARINT:
        raw, pos = read_varint(view, pos, where, message_type)
        if spec.repeated:
            builder.add_varint(raw)
        else:
            fields[spec.name] = _to_signed(raw, 64 if kind == "int64" else 32)
        return pos
    width = _FIXED_DTYPES[kind].itemsize
    if pos + width > len(view):
        raise fail(where, message_type, f"field {spec.name} ({number}) needs {width} bytes "
                   f"but only {len(view) - pos} remain")
    octets = view[pos:pos + width]
    if spec.repeated:
        builder.add_fixed(octets)
    else:
        fields[spec.name] = struct.unpack("<f" if width == 4 else "<d", octets)[0]
    return pos + width


def _decode_utf8(value: memoryview, spec: FieldSpec, number: int, where: str,
                 message_type: str) -> str:
    try:
        return str(value, "utf-8")
    except UnicodeDecodeError as error:
        raise ModelFormatError(
            f"Field {spec.name} ({number}) of {where} ({message_type}) is not valid UTF-8 "
            f"({error.reason} at byte {error.start}); ONNX strings must be UTF-8."
        ) from error


def _skip(view: memoryview, pos: int, number: int, wire: int, where: str, message_type: str,
          depth: int, max_depth: int) -> int:
    """Step over a field the schema does not declare, without decoding its contents."""
    if wire == WIRE_VARINT:
        return read_varint(view, pos, where, message_type)[1]
    if wire in (WIRE_FIXED64, WIRE_FIXED32):
        width = 8 if wire == WIRE_FIXED64 else 4
        if pos + width > len(view):
            raise fail(where, message_type, f"field {number} needs {width} bytes but only "
                       f"{len(view) - pos} remain")
        return pos + width
    if wire == WIRE_LEN:
        # The payload may be a message; it counts as a level even though it is not read.
        if depth + 1 > max_depth:
            raise ModelFormatError(
                f"Unknown field {number} of {where} ({message_type}) sits {depth + 1} messages "
                f"deep; the limit `max_protobuf_depth` is {max_depth}."
            )
        return _read_length(view, pos, where, message_type, number)[1]
    raise fail(where, message_type,
               f"field {number} uses wire type {wire} ({_WIRE_NAMES[wire]}); only wire types "
               "0, 1, 2 and 5 are supported (ONNX does not use groups)")
