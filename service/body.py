"""Reading a request body under a size limit, whether sized or chunked.

The declared Content-Length is checked before a byte is read; the stream itself is counted while
it arrives, so a chunked (or lying) upload is cut off as soon as it passes the limit.
"""

from __future__ import annotations

from fastapi import Request

from .errors import ApiError


async def read_body(request: Request, *, max_bytes: int) -> bytes:
    """Return the whole body of `request`, or raise `ApiError` 413 once it exceeds `max_bytes`."""
    declared = request.headers.get("content-length")
    if declared is not None:
        if not declared.isdigit():
            raise ApiError(400, f"the Content-Length header is {declared!r}; expected a "
                                "non-negative integer.")
        if int(declared) > max_bytes:
            raise ApiError(413, f"the body is {int(declared)} bytes (Content-Length); the limit "
                                f"is {max_bytes} bytes.")
    chunks: list[bytes] = []
    received = 0
    async for chunk in request.stream():
        received += len(chunk)
        if received > max_bytes:
            raise ApiError(413, f"the body exceeds the limit of {max_bytes} bytes (stopped "
                                f"reading after {received} bytes).")
        chunks.append(chunk)
    return b"".join(chunks)
