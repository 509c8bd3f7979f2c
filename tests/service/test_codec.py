"""Encodings: content negotiation, safe decoding, typed arrays."""

from __future__ import annotations

import msgpack
import numpy as np
import pytest

from stridecast.service.codec import (
    DecodeError,
    check_structure,
    decode_body,
    encode,
    preferred_media,
    typed_array,
)

JSON = "application/json"
MSGPACK = "application/msgpack"


@pytest.mark.parametrize(("accept", "expected"), [
    (None, JSON),
    ("", JSON),
    ("*/*", JSON),
    ("application/json", JSON),
    ("application/msgpack", MSGPACK),
    ("application/x-msgpack", MSGPACK),
    ("application/msgpack, application/json", MSGPACK),  # equal quality: first listed wins
    ("application/json, application/msgpack", JSON),
    ("application/json;q=0.5, application/msgpack", MSGPACK),
    ("application/msgpack;q=0.2, */*", JSON),
    ("application/msgpack, */*;q=0.1", MSGPACK),
    ("text/html", JSON),  # nothing acceptable: JSON rather than 406
    ("application/msgpack;q=abc, application/json;q=0.1", JSON),
])
def test_preferred_media(accept, expected):
    assert preferred_media(accept) == expected


def test_typed_array_is_little_endian_row_major():
    array = np.arange(6, dtype=">f8").reshape(2, 3)
    typed = typed_array(array)
    assert typed["dtype"] == "<f8" and typed["shape"] == [2, 3]
    # Row-major bytes of the values 0..5 as little-endian doubles (IEEE 754, common practice).
    assert typed["data"] == np.arange(6, dtype="<f8").tobytes()


def test_encode_json_and_msgpack():
    document = {"state": np.asarray([0.1, 2.0], dtype=np.float32), "n": np.int64(3)}
    assert encode(document, JSON) == b'{"state":[0.10000000149011612,2.0],"n":3}'
    decoded = msgpack.unpackb(encode(document, MSGPACK))
    assert decoded["n"] == 3
    assert decoded["state"]["data"] == np.asarray([0.1, 2.0], dtype="<f4").tobytes()


@pytest.mark.parametrize("content_type", ["application/json", "application/json; charset=utf-8",
                                          "Application/JSON"])
def test_decode_json_types(content_type):
    assert decode_body(content_type, b'{"a": [1, 2.5]}', max_depth=4) == {"a": [1, 2.5]}


@pytest.mark.parametrize("content_type", ["application/msgpack", "application/x-msgpack",
                                          "application/vnd.msgpack"])
def test_decode_msgpack_types(content_type):
    body = msgpack.packb({"a": b"\x00\x01"})
    assert decode_body(content_type, body, max_depth=4) == {"a": b"\x00\x01"}


def test_msgpack_forged_length_is_refused_before_allocating():
    # array32 header announcing 2**31 elements in a 5-byte body (msgpack spec, "array 32").
    with pytest.raises(DecodeError, match="not valid MessagePack") as caught:
        decode_body(MSGPACK, b"\xdd\x80\x00\x00\x00", max_depth=4)
    assert caught.value.status == 400


def test_check_structure_depth_counts_lists_and_maps():
    check_structure({"a": [[1]]}, max_depth=3)
    with pytest.raises(DecodeError, match="nested more than 2 levels deep"):
        check_structure({"a": [[1]]}, max_depth=2)
