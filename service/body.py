"""Reading a request body under a size limit, whether sized or chunked.

The declared Content-Length is checked before a byte is read; the stream itself is counted while
it arrives, so a chunked (or lying) upload is cut off as soon as it passes the limit. Those
refusals close the connection (RFC 9110 §15.5.14), so the answer reaches a client that is still
sending instead of waiting behind the rest of its upload.
"""

from __future__ import annotations

import anyio
from fastapi import Request
from starlette.requests import ClientDisconnect

from .errors import ApiError

# Sent with answers given before the whole body was read: the rest of it is not wanted.
CLOSE = {"Connection": "close"}


async def read_body(request: Request, *, max_bytes: int, timeout: float | None = None) -> bytes:
    """Return the whole body of `request`, or raise `ApiError`.

    413 once it exceeds `max_bytes`; 408 when it has not fully arrived within `timeout`
    seconds (a trickling client must not hold a connection past the request budget); 400 when
    the client goes away mid-body (not a server error, and nothing worth a traceback).
    """
    declared = request.headers.get("content-length")
    if declared is not None:
        if not declared.isdigit():
            raise ApiError(400, f"the Content-Length header is {declared!r}; expected a "
                                "non-negative integer.")
        if int(declared) > max_bytes:
            raise ApiError(413, f"the body is {int(declared)} bytes (Content-Length); the limit "
                                f"is {max_bytes} bytes.", headers=CLOSE)
    chunks: list[bytes] = []
    received = 0
    try:
        with anyio.fail_after(timeout):
            async for chunk in request.stream():
                received += len(chunk)
                if received > max_bytes:
                    raise ApiError(413, f"the body exceeds the limit of {max_bytes} bytes "
                                        f"(stopped reading after {received} bytes).",
                                   headers=CLOSE)
                chunks.append(chunk)
    except TimeoutError as error:
        raise ApiError(408, f"the body did not arrive within {timeout:g} s (received "
                            f"{received} bytes); send it at once.", headers=CLOSE) from error
    except ClientDisconnect as error:
        raise ApiError(400, f"the client disconnected after {received} bytes of its body.") \
            from error
    return b"".join(chunks)
