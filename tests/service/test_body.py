"""`service/body.py`: reading a request body under a size limit and a time budget.

Sources: RFC 9110 §8.6 (Content-Length = 1*DIGIT), §15.5.14 (413 Content Too Large: a server
that refuses a body may close the connection, §7.6.1 `Connection: close`), §15.5.9 (408 Request
Timeout); the ASGI HTTP connection scope (asgi.readthedocs.io, "HTTP & WebSocket ASGI Message
Format": `http.request` messages with `body` and `more_body`, `http.disconnect`).
"""

from __future__ import annotations

import asyncio

import pytest
from starlette.requests import Request

from stridecast.service.body import read_body
from stridecast.service.errors import ApiError


class Upload:
    """An ASGI `receive` that hands out `chunks` and counts what was asked of it."""

    def __init__(self, chunks, *, delay: float = 0.0, disconnect: bool = False):
        self.chunks = list(chunks)
        self.delay = delay
        self.disconnect = disconnect
        self.calls = 0

    async def __call__(self):
        self.calls += 1
        if self.delay:
            await asyncio.sleep(self.delay)
        if not self.chunks:
            if self.disconnect:
                return {"type": "http.disconnect"}
            return {"type": "http.request", "body": b"", "more_body": False}
        chunk = self.chunks.pop(0)
        more = bool(self.chunks) or self.disconnect
        return {"type": "http.request", "body": chunk, "more_body": more}


def _read(upload: Upload, *, length: str | None = None, max_bytes: int = 100,
          timeout: float | None = None) -> bytes:
    headers = [] if length is None else [(b"content-length", length.encode())]
    scope = {"type": "http", "method": "POST", "path": "/", "headers": headers,
             "query_string": b""}
    return asyncio.run(read_body(Request(scope, upload), max_bytes=max_bytes, timeout=timeout))


def _refusal(upload: Upload, **options) -> ApiError:
    with pytest.raises(ApiError) as caught:
        _read(upload, **options)
    assert caught.value.message.endswith(".")
    return caught.value


@pytest.mark.parametrize("length", [None, "100"])
def test_a_body_up_to_the_limit_is_read_whole(length):
    chunks = [b"a" * 40, b"b" * 50, b"c" * 10]
    assert _read(Upload(chunks), length=length, max_bytes=100) == b"".join(chunks)


def test_an_empty_body_is_empty():
    assert _read(Upload([]), length="0") == b""


def test_a_declared_length_over_the_limit_is_refused_before_reading():
    upload = Upload([b"x" * 101])
    error = _refusal(upload, length="101", max_bytes=100)
    assert error.status == 413 and error.headers == {"Connection": "close"}
    assert "101 bytes (Content-Length); the limit is 100 bytes" in error.message
    assert upload.calls == 0


@pytest.mark.parametrize("length", ["-1", "1e3", "12 ", "0x10", ""])
def test_a_content_length_that_is_not_digits_is_400(length):
    # RFC 9110 §8.6: Content-Length = 1*DIGIT.
    error = _refusal(Upload([b"{}"]), length=length)
    assert error.status == 400 and repr(length) in error.message


def test_a_chunked_body_is_cut_off_at_the_chunk_that_passes_the_limit():
    upload = Upload([b"x" * 60, b"y" * 60, b"z" * 60, b"w" * 60])
    error = _refusal(upload, max_bytes=100)
    assert error.status == 413 and error.headers == {"Connection": "close"}
    assert "stopped reading after 120 bytes" in error.message
    assert upload.calls == 2  # nothing read past the chunk that crossed the limit


def test_a_body_longer_than_declared_is_cut_off_too():
    error = _refusal(Upload([b"x" * 80, b"y" * 80]), length="10", max_bytes=100)
    assert error.status == 413 and "after 160 bytes" in error.message


def test_a_body_that_does_not_arrive_in_time_is_408():
    upload = Upload([b"x" * 10, b"y" * 10], delay=0.2)
    error = _refusal(upload, timeout=0.05)
    assert error.status == 408 and error.headers == {"Connection": "close"}
    assert "did not arrive within 0.05 s" in error.message


def test_a_client_that_leaves_mid_body_is_400():
    error = _refusal(Upload([b"x" * 7], disconnect=True))
    assert error.status == 400
    assert "disconnected after 7 bytes" in error.message
