"""Tests of the generic protobuf wire-format decoder (runtime/protobuf.py).

Reference encodings come from the protobuf specification ("Encoding" guide) and from the
protobuf library itself, reached through onnx's generated message classes (test-only import).
"""

from __future__ import annotations

import numpy as np
import onnx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stridecast.runtime import protobuf
from stridecast.runtime.errors import ModelFormatError
from stridecast.runtime.protobuf import FieldSpec, MessageSchema, read_message, read_varint
from tests.builders import length_delimited, tag, varint

MAX_DEPTH = 16


def read(data: bytes, schema, *, depth: int = 1, max_depth: int = MAX_DEPTH,
         max_items: int = 1000) -> dict:
    return read_message(memoryview(data), MessageSchema("TestProto", schema), where="test",
                        depth=depth, max_depth=max_depth, max_items=max_items)


SCHEMA = {
    1: FieldSpec("count", "int64"),
    2: FieldSpec("small", "int32"),
    3: FieldSpec("ratio", "float"),
    4: FieldSpec("precise", "double"),
    5: FieldSpec("label", "string"),
    6: FieldSpec("blob", "bytes"),
    7: FieldSpec("child", "message"),
    8: FieldSpec("floats", "float", True),
    9: FieldSpec("longs", "int64", True),
    10: FieldSpec("ints", "int32", True),
    11: FieldSpec("doubles", "double", True),
    12: FieldSpec("names", "string", True),
}


# --- varints -------------------------------------------------------------------------------

@pytest.mark.parametrize(
    ("encoded", "value"),
    [
        # Examples from the protobuf encoding guide: 1, 150 and the 300 of "Base 128 Varints".
        (b"\x01", 1), (b"\x96\x01", 150), (b"\xac\x02", 300),
        (b"\x00", 0), (b"\x7f", 127), (b"\x80\x01", 128),
        # 2^64 - 1 is nine 0xff bytes and a final 0x01 (the largest 10-byte varint).
        (b"\xff" * 9 + b"\x01", 2**64 - 1),
    ],
)
def test_read_varint_decodes_spec_examples(encoded: bytes, value: int) -> None:
    assert read_varint(memoryview(encoded), 0, "test", "TestProto") == (value, len(encoded))


@given(st.integers(min_value=0, max_value=2**64 - 1))
def test_read_varint_round_trips_every_64_bit_value(value: int) -> None:
    encoded = varint(value)
    assert read_varint(memoryview(encoded + b"\x05"), 0, "t", "T") == (value, len(encoded))


def test_read_varint_rejects_eleven_bytes() -> None:
    with pytest.raises(ModelFormatError, match=r"varint at byte 0 is longer than 10 bytes"):
        read_varint(memoryview(b"\x80" * 10 + b"\x01"), 0, "test", "TestProto")


def test_read_varint_rejects_values_of_two_to_the_64() -> None:
    with pytest.raises(ModelFormatError, match=r"2\^64 or larger"):
        read_varint(memoryview(b"\xff" * 9 + b"\x02"), 0, "test", "TestProto")


@pytest.mark.parametrize("data", [b"", b"\x80", b"\xff\xff"])
def test_read_varint_rejects_truncation(data: bytes) -> None:
    with pytest.raises(ModelFormatError, match=r"Malformed protobuf in test \(TestProto\): "
                       r"the data ends inside a varint"):
        read_varint(memoryview(data), 0, "test", "TestProto")


# --- tags and wire types -------------------------------------------------------------------

def test_field_number_zero_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"field number 0 is outside 1\.\.536870911"):
        read(tag(0, 0) + b"\x01", SCHEMA)


def test_field_number_of_two_to_the_29_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"field number 536870912 is outside"):
        read(tag(2**29, 0) + b"\x01", SCHEMA)


def test_largest_field_number_is_skipped_as_unknown() -> None:
    assert read(tag(2**29 - 1, 0) + b"\x01" + tag(1, 0) + b"\x05", SCHEMA)["count"] == 5


@pytest.mark.parametrize(("wire", "label"), [(3, "group start"), (4, "group end"),
                                             (6, "reserved type 6"), (7, "reserved type 7")])
def test_groups_and_reserved_wire_types_are_rejected(wire: int, label: str) -> None:
    with pytest.raises(ModelFormatError, match=rf"field 99 uses wire type {wire} \({label}\); "
                       r"only wire types 0, 1, 2 and 5 are supported"):
        read(tag(99, wire) + b"\x00", SCHEMA)


def test_declared_field_with_wrong_wire_type_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"field label \(5\) arrives as wire type 0 "
                       r"\(varint\) but is declared string, wire type 2"):
        read(tag(5, 0) + b"\x01", SCHEMA)


# --- lengths -------------------------------------------------------------------------------

def test_length_past_the_end_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"field 6 declares 5 bytes but only 3 remain"):
        read(tag(6, 2) + varint(5) + b"abc", SCHEMA)


def test_length_near_two_to_the_62_is_rejected_before_slicing() -> None:
    with pytest.raises(ModelFormatError, match=rf"field 99 declares {2**62 - 1} bytes"):
        read(tag(99, 2) + varint(2**62 - 1) + b"abc", SCHEMA)


@pytest.mark.parametrize(("wire", "tail"), [(1, b"\x00" * 7), (5, b"\x00" * 3)])
def test_truncated_fixed_width_values_are_rejected(wire: int, tail: bytes) -> None:
    with pytest.raises(ModelFormatError, match=r"needs (8|4) bytes but only (7|3) remain"):
        read(tag(99, wire) + tail, SCHEMA)
    declared = 4 if wire == 1 else 3
    with pytest.raises(ModelFormatError, match=r"needs (8|4) bytes"):
        read(tag(declared, wire) + tail, SCHEMA)


# --- decoding declared fields --------------------------------------------------------------

def test_scalars_strings_and_messages_decode_like_the_protobuf_library() -> None:
    # The protobuf library encodes; onnx.AttributeProto has an int64 i, a float f and bytes s.
    attribute = onnx.AttributeProto(name="naïve", i=-7, f=0.1, s=b"\x00\xff")
    schema = {1: FieldSpec("name", "string"), 2: FieldSpec("f", "float"),
              3: FieldSpec("i", "int64"), 4: FieldSpec("s", "bytes")}
    fields = read(attribute.SerializeToString(), schema)
    assert fields["name"] == "naïve"
    assert fields["i"] == -7
    assert fields["f"] == float(np.float32(0.1))  # the float32 nearest 0.1, widened exactly
    assert bytes(fields["s"]) == b"\x00\xff"


def test_negative_int32_travels_as_ten_byte_varint() -> None:
    # The protobuf library writes int32 -2 sign-extended to 64 bits: ten bytes.
    encoded = onnx.TensorProto(data_type=-2).SerializeToString()
    assert len(encoded) == 11
    assert read(encoded, {2: FieldSpec("data_type", "int32")})["data_type"] == -2


def test_unknown_fields_of_every_wire_type_are_skipped() -> None:
    data = (tag(20, 0) + varint(2**63) + tag(21, 1) + b"\x00" * 8 + tag(22, 5) + b"\x00" * 4
            + length_delimited(23, b"\xff\xff") + tag(1, 0) + varint(42))
    fields = read(data, SCHEMA)
    assert fields["count"] == 42
    assert set(fields) == {"count", "floats", "longs", "ints", "doubles", "names"}


def test_absent_repeated_fields_are_empty() -> None:
    fields = read(b"", SCHEMA)
    assert fields["names"] == []
    assert fields["floats"].count() == 0
    assert fields["floats"].to_array().dtype == np.float32
    assert fields["longs"].to_array().shape == (0,)


def test_last_scalar_wins_and_duplicate_messages_are_rejected() -> None:
    # Protobuf semantics: a repeated singular scalar keeps its last value.
    assert read(tag(1, 0) + b"\x01" + tag(1, 0) + b"\x02", SCHEMA)["count"] == 2
    with pytest.raises(ModelFormatError, match=r"singular message field child \(7\) occurs more "
                       r"than once"):
        read(length_delimited(7, b"") + length_delimited(7, b""), SCHEMA)


def test_invalid_utf8_string_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"Field label \(5\) of test \(TestProto\) is not "
                       r"valid UTF-8 .*; ONNX strings must be UTF-8\."):
        read(length_delimited(5, b"\xff\xfe"), SCHEMA)


# --- repeated scalars ----------------------------------------------------------------------

INT64S = st.lists(st.integers(min_value=-(2**63), max_value=2**63 - 1), max_size=40)


@given(INT64S)
@settings(max_examples=60, deadline=None)
def test_packed_and_unpacked_int64_match_the_protobuf_library(values: list[int]) -> None:
    # TensorProto.int64_data is declared [packed = true]; AttributeProto.ints is not, so the
    # protobuf library writes one encoding each.
    packed = onnx.TensorProto(int64_data=values).SerializeToString()
    unpacked = onnx.AttributeProto(ints=values).SerializeToString()
    assert read(packed, {7: FieldSpec("v", "int64", True)})["v"].to_array().tolist() == values
    assert read(unpacked, {8: FieldSpec("v", "int64", True)})["v"].to_array().tolist() == values


@given(st.lists(st.integers(min_value=-(2**31), max_value=2**31 - 1), max_size=40))
@settings(max_examples=60, deadline=None)
def test_packed_int32_matches_the_protobuf_library(values: list[int]) -> None:
    encoded = onnx.TensorProto(int32_data=values).SerializeToString()
    repeated = read(encoded, {5: FieldSpec("v", "int32", True)})["v"]
    assert repeated.count() == len(values)
    decoded = repeated.to_array()
    assert decoded.dtype == np.int32
    assert decoded.tolist() == values


@given(st.lists(st.floats(width=32, allow_nan=False), max_size=40))
@settings(max_examples=60, deadline=None)
def test_packed_and_unpacked_floats_match_the_protobuf_library(values: list[float]) -> None:
    packed = onnx.TensorProto(float_data=values).SerializeToString()
    unpacked = onnx.AttributeProto(floats=values).SerializeToString()
    expected = np.array(values, dtype=np.float32)
    for data, number in ((packed, 4), (unpacked, 7)):
        decoded = read(data, {number: FieldSpec("v", "float", True)})["v"].to_array()
        assert decoded.dtype == np.float32
        assert decoded.tobytes() == expected.tobytes()


def test_mixed_packed_and_unpacked_occurrences_keep_their_order() -> None:
    # Protobuf parsers must accept both encodings of a repeated scalar and concatenate them.
    data = (tag(9, 0) + varint(1) + length_delimited(9, varint(2) + varint(-3)) + tag(9, 0)
            + varint(4) + tag(11, 1) + np.float64(0.5).tobytes()
            + length_delimited(11, np.array([1.5, -2.0]).tobytes()))
    fields = read(data, SCHEMA)
    assert fields["longs"].count() == 4
    assert fields["longs"].to_array().tolist() == [1, 2, -3, 4]
    assert fields["doubles"].to_array().tolist() == [0.5, 1.5, -2.0]


def test_packed_varints_decode_across_blocks(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(protobuf, "_VARINT_BLOCK", 3)
    values = [0, 1, -1, 300, 2**40, -(2**63), 2**63 - 1, 7]
    encoded = onnx.TensorProto(int64_data=values).SerializeToString()
    assert read(encoded, SCHEMA | {7: FieldSpec("v", "int64", True)})["v"].to_array().tolist() \
        == values


def test_large_packed_varints_decode_exactly() -> None:
    values = np.random.default_rng(0).integers(-(2**62), 2**62, size=200_000)
    encoded = onnx.TensorProto(int64_data=values.tolist()).SerializeToString()
    decoded = read(encoded, {7: FieldSpec("v", "int64", True)})["v"].to_array()
    np.testing.assert_array_equal(decoded, values)


def test_packed_fixed_width_payload_must_be_whole_values() -> None:
    with pytest.raises(ModelFormatError, match=r"packed field floats \(8\) holds 6 bytes, not "
                       r"a multiple of 4"):
        read(length_delimited(8, b"\x00" * 6), SCHEMA)


def test_packed_varint_payload_must_not_end_inside_a_varint() -> None:
    with pytest.raises(ModelFormatError, match=r"packed field longs \(9\) ends inside a varint"):
        read(length_delimited(9, b"\x01\x80"), SCHEMA)


def test_packed_varint_longer_than_ten_bytes_is_rejected_on_decode() -> None:
    repeated = read(length_delimited(9, b"\x01" + b"\x80" * 10 + b"\x01"), SCHEMA)["longs"]
    with pytest.raises(ModelFormatError, match=r"packed field longs holds a varint longer "
                       r"than 10 bytes"):
        repeated.to_array()


def test_packed_varint_of_two_to_the_64_is_rejected_on_decode() -> None:
    repeated = read(length_delimited(9, b"\xff" * 9 + b"\x02"), SCHEMA)["longs"]
    with pytest.raises(ModelFormatError, match=r"holds a varint of 2\^64 or more"):
        repeated.to_array()


# --- depth ---------------------------------------------------------------------------------

def test_message_deeper_than_the_limit_is_rejected() -> None:
    with pytest.raises(ModelFormatError, match=r"test \(TestProto\) is nested 5 messages deep; "
                       r"the limit `max_protobuf_depth` is 4\."):
        read(b"", SCHEMA, depth=5, max_depth=4)


def test_unknown_length_delimited_field_counts_as_a_level() -> None:
    data = length_delimited(99, b"")
    assert read(data, SCHEMA, depth=3, max_depth=4)["names"] == []
    with pytest.raises(ModelFormatError, match=r"Unknown field 99 of test \(TestProto\) sits 5 "
                       r"messages deep; the limit `max_protobuf_depth` is 4\."):
        read(data, SCHEMA, depth=4, max_depth=4)


def test_deeply_nested_unknown_field_is_skipped_without_recursion() -> None:
    nested = b""
    for _ in range(5000):
        nested = length_delimited(99, nested)
    assert read(nested + tag(1, 0) + b"\x03", SCHEMA)["count"] == 3


def test_field_spec_rejects_unknown_kinds() -> None:
    with pytest.raises(ValueError, match=r"`kind` must be one of .*, got 'uint8'\."):
        FieldSpec("x", "uint8")


def test_repeated_fields_are_capped_by_max_items() -> None:
    data = length_delimited(12, b"a") * 3
    assert read(data, SCHEMA, max_items=3)["names"] == ["a", "a", "a"]
    with pytest.raises(ModelFormatError, match=r"Field names \(12\) of test \(TestProto\) "
                       r"occurs more than 2 times; repeated fields are limited by "
                       r"`max_graph_nodes`, which is 2\."):
        read(data, SCHEMA, max_items=2)


@pytest.mark.parametrize("number", [0, 2**29])
def test_message_schema_rejects_impossible_field_numbers(number: int) -> None:
    with pytest.raises(ValueError, match=rf"Field numbers must lie in 1\.\.536870911, got "
                       rf"{number}\."):
        MessageSchema("Bad", {number: FieldSpec("x", "int64")})
