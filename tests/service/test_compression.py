"""`service/compression.py`: gzip and deflate request bodies (bounded) and compressed answers.

Sources: RFC 9110 §8.4 (Content-Encoding: codings listed in the order applied, names
case-insensitive, §8.4.1), §12.5.3 (Accept-Encoding and its q-values), §15.5.16 (415 names the
accepted codings in Accept-Encoding); RFC 1952 (gzip, §2.2: a file is a series of members;
§2.3.1: MTIME 0 means no time stamp) and RFC 1950 (zlib, HTTP's "deflate"). The reference
coders are the standard library's `gzip` and `zlib`.
"""

from __future__ import annotations

import gzip
import zlib

import pytest

from stridecast.service.compression import (
    MIN_COMPRESS_BYTES,
    compress,
    decode_content,
    request_codings,
    response_coding,
)
from stridecast.service.errors import ApiError

INFER = "/v2/models/oscillator/infer"
TEXT = b"".join(b"state %d: 0.125, -3.5e-2\n" % i for i in range(200))


def _raw_deflate(data: bytes) -> bytes:
    coder = zlib.compressobj(wbits=-zlib.MAX_WBITS)  # RFC 1951 data without the zlib wrapper
    return coder.compress(data) + coder.flush()


def test_a_zip_bomb_is_refused_without_inflating_it(make_client):
    limited = make_client(max_body_bytes=64 * 1024)
    # 64 MiB of one byte compress to about 64 KiB at gzip's best level (ratio ~1000:1).
    bomb = gzip.compress(b"0" * (64 * 1024 * 1024), compresslevel=9)
    assert len(bomb) < 64 * 1024
    response = limited.post(INFER, content=bomb, headers={"content-encoding": "gzip"})
    assert response.status_code == 413
    assert "decompressed body exceeds the limit of 65536 bytes" in response.json()["error"]


@pytest.mark.parametrize(("body", "coding", "status", "pattern"), [
    (b"not gzip", "gzip", 400, "not valid gzip data"),
    (gzip.compress(b"{}")[:-6], "gzip", 400, "truncated"),
    (b"{}", "br", 415, "Content-Encoding is 'br'"),
])
def test_bad_content_codings(client, body, coding, status, pattern):
    response = client.post(INFER, content=body, headers={"content-encoding": coding})
    assert response.status_code == status
    assert pattern in response.json()["error"]


@pytest.mark.parametrize(("header", "codings"), [
    (None, []), ("", []), ("identity", []), ("gzip", ["gzip"]), ("GZip", ["gzip"]),
    ("deflate, gzip", ["deflate", "gzip"]), (" gzip ,identity", ["gzip"]),
])
def test_request_codings_in_the_order_applied(header, codings):
    assert request_codings(header) == codings


def test_an_unknown_request_coding_is_415_naming_the_accepted_ones():
    with pytest.raises(ApiError) as caught:
        request_codings("gzip, br")
    assert caught.value.status == 415
    assert "'gzip, br'" in caught.value.message and caught.value.message.endswith(".")
    assert caught.value.headers["Accept-Encoding"] == "gzip, deflate"


@pytest.mark.parametrize(("codings", "encode"), [
    (["gzip"], gzip.compress),
    (["deflate"], zlib.compress),
    (["deflate"], _raw_deflate),
    # Two gzip members one after the other decode to the concatenation (RFC 1952 §2.2).
    (["gzip"], lambda data: gzip.compress(data[:1000]) + gzip.compress(data[1000:])),
    # Applied deflate first, then gzip: undone in reverse (RFC 9110 §8.4).
    (["deflate", "gzip"], lambda data: gzip.compress(zlib.compress(data))),
])
def test_decode_content_undoes_the_standard_library_coders(codings, encode):
    assert decode_content(encode(TEXT), codings, max_bytes=len(TEXT)) == TEXT


@pytest.mark.parametrize("coding", ["gzip", "deflate"])
def test_decoded_size_limit_is_exact(coding):
    encoded = (gzip.compress if coding == "gzip" else zlib.compress)(TEXT)
    assert decode_content(encoded, [coding], max_bytes=len(TEXT)) == TEXT
    with pytest.raises(ApiError) as caught:
        decode_content(encoded, [coding], max_bytes=len(TEXT) - 1)
    assert caught.value.status == 413
    assert f"limit of {len(TEXT) - 1} bytes" in caught.value.message


def test_a_gzip_member_that_expands_past_the_limit_is_413_even_if_later_ones_are_small():
    encoded = gzip.compress(b"a" * 600) + gzip.compress(b"b" * 600)
    assert decode_content(encoded, ["gzip"], max_bytes=1200) == b"a" * 600 + b"b" * 600
    with pytest.raises(ApiError) as caught:
        decode_content(encoded, ["gzip"], max_bytes=1199)
    assert caught.value.status == 413


@pytest.mark.parametrize(("coding", "body", "pattern"), [
    ("gzip", gzip.compress(TEXT)[:-10], "truncated"),
    ("deflate", zlib.compress(TEXT)[:-10], "truncated"),
    ("deflate", zlib.compress(TEXT) + b"junk", "4 bytes after its end"),
    ("gzip", b"\x1f\x8b" + b"\x00" * 20, "not valid gzip data"),
    ("deflate", b"\xff\xff\xff\xff", "not valid deflate data"),
])
def test_broken_bodies_are_400_naming_the_fault(coding, body, pattern):
    with pytest.raises(ApiError) as caught:
        decode_content(body, [coding], max_bytes=10 * len(TEXT))
    assert caught.value.status == 400
    assert pattern in caught.value.message


@pytest.mark.parametrize(("header", "coding"), [
    (None, None), ("", None), ("identity", None), ("gzip", "gzip"), ("deflate", "deflate"),
    ("GZIP", "gzip"),
    # A tie goes to gzip; otherwise the higher q-value wins (RFC 9110 §12.5.3).
    ("deflate, gzip", "gzip"), ("gzip;q=0.5, deflate", "deflate"),
    ("deflate;q=0.9, gzip;q=0.8", "deflate"),
    # q=0 means "not acceptable" (§12.5.3); "*" stands for any coding not listed.
    ("gzip;q=0", None), ("*", "gzip"), ("*;q=0.5, gzip;q=0.1", "deflate"),
    ("*;q=0, deflate", "deflate"), ("br", None),
])
def test_response_coding_follows_q_values(header, coding):
    assert response_coding(header) == coding


def test_small_answers_are_sent_as_they_are():
    body = TEXT[:MIN_COMPRESS_BYTES - 1]
    assert compress(body, "gzip") == (body, {})
    assert compress(TEXT, None) == (TEXT, {})


def test_compressed_answers_decode_with_the_standard_library_and_are_reproducible():
    packed, headers = compress(TEXT, "gzip")
    assert headers == {"Content-Encoding": "gzip"}
    assert gzip.decompress(packed) == TEXT and len(packed) < len(TEXT)
    # MTIME (bytes 4–7 of the member header, RFC 1952 §2.3.1) is 0: equal answers, equal bytes.
    assert packed[4:8] == b"\x00\x00\x00\x00"
    assert compress(TEXT, "gzip")[0] == packed
    packed, headers = compress(TEXT, "deflate")
    assert headers == {"Content-Encoding": "deflate"}
    assert zlib.decompress(packed) == TEXT
