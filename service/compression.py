"""Content codings: gzip and deflate request bodies (bounded) and compressed answers.

RFC 9110 §8.4 (Content-Encoding) and §12.5.3 (Accept-Encoding); the codings themselves are
RFC 1952 (gzip) and RFC 1950 (the zlib format, which HTTP calls "deflate").
"""

from __future__ import annotations

import gzip
import zlib

from .errors import ApiError

CODINGS = ("gzip", "deflate")
# Answers smaller than this gain little from compression (common practice: about one packet).
MIN_COMPRESS_BYTES = 1024
_WINDOW_BITS = {"gzip": 16 + zlib.MAX_WBITS, "deflate": zlib.MAX_WBITS}


def request_codings(header: str | None) -> list[str]:
    """The codings of a Content-Encoding header, in the order they were applied."""
    if not header:
        return []
    codings = [item.strip().lower() for item in header.split(",") if item.strip()]
    codings = [coding for coding in codings if coding != "identity"]
    unknown = [coding for coding in codings if coding not in CODINGS]
    if unknown:
        raise ApiError(415, f"the Content-Encoding is {header!r}; expected 'gzip', 'deflate' or "
                            "'identity'.", headers={"Accept-Encoding": "gzip, deflate"})
    return codings


def decode_content(body: bytes, codings: list[str], *, max_bytes: int) -> bytes:
    """Undo `codings` (last applied first); 413 once the decoded body passes `max_bytes`.

    Decompression stops after `max_bytes + 1` bytes of output, so a small body that would
    expand to gigabytes (a zip bomb) costs no more memory than the limit.
    """
    for coding in reversed(codings):
        body = _inflate(body, coding, max_bytes=max_bytes)
    return body


def _inflate(data: bytes, coding: str, *, max_bytes: int) -> bytes:
    pieces: list[bytes] = []
    produced = 0
    remaining = data
    # gzip allows several members one after another (RFC 1952 §2.2); loop over them.
    while True:
        inflater = zlib.decompressobj(_WINDOW_BITS[coding])
        try:
            piece = inflater.decompress(remaining, max_bytes + 1 - produced)
        except zlib.error as error:
            if coding == "deflate" and not pieces and remaining is data:
                # Some clients send raw RFC 1951 data under "deflate"; accept it too.
                return _raw_deflate(data, max_bytes=max_bytes)
            raise ApiError(400, f"the body is not valid {coding} data: {error}.") from error
        produced += len(piece)
        pieces.append(piece)
        if produced > max_bytes or inflater.unconsumed_tail:
            raise _too_large(max_bytes)
        if not inflater.eof:
            raise ApiError(400, f"the {coding} body is truncated (no end of stream).")
        remaining = inflater.unused_data
        if coding != "gzip" or not remaining:
            break
    if remaining:
        raise ApiError(400, f"the {coding} body has {len(remaining)} bytes after its end.")
    return b"".join(pieces)


def _raw_deflate(data: bytes, *, max_bytes: int) -> bytes:
    inflater = zlib.decompressobj(-zlib.MAX_WBITS)
    try:
        output = inflater.decompress(data, max_bytes + 1)
    except zlib.error as error:
        raise ApiError(400, f"the body is not valid deflate data: {error}.") from error
    if len(output) > max_bytes or inflater.unconsumed_tail:
        raise _too_large(max_bytes)
    if not inflater.eof or inflater.unused_data:
        raise ApiError(400, "the deflate body is truncated or has bytes after its end.")
    return output


def _too_large(max_bytes: int) -> ApiError:
    return ApiError(413, f"the decompressed body exceeds the limit of {max_bytes} bytes.",
                    headers={"Connection": "close"})


def response_coding(accept_encoding: str | None) -> str | None:
    """The coding to answer with: gzip or deflate if the client prefers one, else None.

    Follows the q-values of Accept-Encoding (RFC 9110 §12.5.3); on a tie gzip is preferred.
    """
    if not accept_encoding:
        return None
    qualities: dict[str, float] = {}
    wildcard = None
    for item in accept_encoding.split(","):
        name, _, parameters = item.strip().partition(";")
        name = name.strip().lower()
        quality = 1.0
        key, _, value = parameters.strip().partition("=")
        if key.strip().lower() == "q":
            try:
                quality = float(value)
            except ValueError:
                quality = 0.0
        if name == "*":
            wildcard = quality
        elif name:
            qualities[name] = quality
    best, best_quality = None, 0.0
    for coding in CODINGS:
        quality = qualities.get(coding, wildcard if wildcard is not None else 0.0)
        if quality > best_quality:
            best, best_quality = coding, quality
    return best


def compress(body: bytes, coding: str | None) -> tuple[bytes, dict[str, str]]:
    """`body` in `coding` (if worth it) and the headers that say so."""
    if coding is None or len(body) < MIN_COMPRESS_BYTES:
        return body, {}
    if coding == "gzip":
        # mtime=0: the same answer compresses to the same bytes.
        return gzip.compress(body, compresslevel=5, mtime=0), {"Content-Encoding": "gzip"}
    return zlib.compress(body, 5), {"Content-Encoding": "deflate"}
