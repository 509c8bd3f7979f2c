"""Shared HTTP request material: the table of malformed requests and the documented routes.

Used by the service tests (in-process) and the reliability tests (a real server). Statuses
follow common practice (RFC 9110): 400 malformed, 413 too large, 415 wrong media type, 422
well-formed but invalid, 404 unknown model.
"""

from __future__ import annotations

import json

import msgpack
import numpy as np

from stridecast.service import create_app

ADVANCE = "/v1/models/oscillator/advance"
FORECAST = "/v1/models/oscillator/forecast"
JSON_TYPE = "application/json"
MSGPACK_TYPE = "application/msgpack"
LIMITS = {"max_body_bytes": 4096, "max_batch": 4, "max_forecast_points": 10, "max_depth": 16}


def typed(dtype: str, shape: list[int], data: bytes) -> dict:
    return {"dtype": dtype, "shape": shape, "data": data}


def jsonb(document) -> bytes:
    return json.dumps(document).encode()


def packed(document) -> bytes:
    return msgpack.packb(document, use_bin_type=True)


STATE_F4 = np.asarray([1.0, 0.0], dtype="<f4")

# (id, route, content type, body, status, pattern in the error message)
CASES = [
    ("malformed-json", ADVANCE, JSON_TYPE, b'{"state": [1, 0], "t": ', 400, r"not valid JSON"),
    ("json-not-utf8", ADVANCE, JSON_TYPE, b'{"state": "\xff"}', 400, r"not valid UTF-8"),
    ("malformed-msgpack", ADVANCE, MSGPACK_TYPE, b"\xc1", 400, r"not valid MessagePack"),
    ("truncated-msgpack", ADVANCE, MSGPACK_TYPE, packed({"state": [1.0, 0.0], "t": 1.0})[:-3],
     400, r"not valid MessagePack"),
    ("msgpack-trailing-bytes", ADVANCE, MSGPACK_TYPE,
     packed({"state": [1.0, 0.0], "t": 1.0}) + b"\x00", 400, r"trailing bytes"),
    ("msgpack-ext-type", ADVANCE, MSGPACK_TYPE,
     packed({"state": msgpack.ExtType(5, b"abc"), "t": 1.0}), 400, r"extension type 5"),
    ("msgpack-timestamp", ADVANCE, MSGPACK_TYPE,
     packed({"state": msgpack.Timestamp(1, 0), "t": 1.0}), 400, r"type Timestamp"),
    ("msgpack-int-keys", ADVANCE, MSGPACK_TYPE, packed({1: [1.0, 0.0]}), 400,
     r"not valid MessagePack"),
    ("json-deep-nesting", ADVANCE, JSON_TYPE, b'{"state": ' + b"[" * 40 + b"]" * 40 + b"}",
     400, r"nested more than 16 levels"),
    ("json-very-deep-nesting", ADVANCE, JSON_TYPE, b"[" * 2000 + b"]" * 2000, 400,
     r"nested (too deeply|more than 16 levels)"),
    ("msgpack-deep-nesting", ADVANCE, MSGPACK_TYPE, b"\x91" * 40 + b"\xc0", 400,
     r"nested more than 16 levels"),
    ("json-nan", ADVANCE, JSON_TYPE, b'{"state": [NaN, 0], "t": 1}', 422, r"contains NaN"),
    ("json-infinity", ADVANCE, JSON_TYPE, b'{"state": [1, 0], "t": Infinity}', 422,
     r"contains Infinity"),
    ("json-minus-infinity", ADVANCE, JSON_TYPE, b'{"state": [-Infinity, 0], "t": 1}', 422,
     r"contains -Infinity"),
    ("json-1e999-state", ADVANCE, JSON_TYPE, b'{"state": [1e999, 0], "t": 1}', 422,
     r"`state` holds inf at index \[0\]; expected finite numbers"),
    ("json-1e999-t", ADVANCE, JSON_TYPE, b'{"state": [1, 0], "t": 1e999}', 422,
     r"`t` is inf; expected a finite time ≥ 0 \(in s\)\."),
    ("msgpack-nan", ADVANCE, MSGPACK_TYPE, packed({"state": [float("nan"), 0.0], "t": 1.0}),
     422, r"`state` holds nan"),
    ("huge-integer", ADVANCE, JSON_TYPE, b'{"state": [' + b"9" * 400 + b', 0], "t": 1}', 422,
     r"integer too large"),
    ("string-in-state", ADVANCE, JSON_TYPE, jsonb({"state": ["1", 0], "t": 1}), 422,
     r"`state` contains the string '1'; expected numbers only"),
    ("boolean-in-state", ADVANCE, JSON_TYPE, jsonb({"state": [True, 0], "t": 1}), 422,
     r"`state` contains the boolean true"),
    ("string-t", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0], "t": "1"}), 422,
     r"`t` is the string '1'; expected a number\."),
    ("boolean-t", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0], "t": True}), 422,
     r"`t` is the boolean true"),
    ("null-state", ADVANCE, JSON_TYPE, jsonb({"state": None, "t": 1}), 422,
     r"`state` must be an array of numbers; got null"),
    ("negative-t", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0], "t": -0.5}), 422,
     r"`t` is -0.5; expected a finite time ≥ 0 \(in s\)\."),
    ("wrong-dimension", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0, 3], "t": 1}), 422,
     r"^`state` has shape \(3,\); this bundle's state has 2 components \['x', 'v'\], so "
     r"expected \(2,\) or \(batch, 2\)\.$"),
    ("wrong-dimension-batch", ADVANCE, JSON_TYPE, jsonb({"state": [[1, 0, 3]], "t": 1}), 422,
     r"`state` has shape \(1, 3\); this bundle's state has 2 components"),
    ("three-dimensional", ADVANCE, JSON_TYPE, jsonb({"state": [[[1, 0]]], "t": 1}), 422,
     r"`state` has shape \(1, 1, 2\); this bundle's state"),
    ("ragged-batch", ADVANCE, JSON_TYPE, jsonb({"state": [[1, 0], [3]], "t": 1}), 422,
     r"`state` is ragged"),
    ("ragged-mixed", ADVANCE, JSON_TYPE, jsonb({"state": [[1, 0], 3], "t": 1}), 422,
     r"`state` is ragged"),
    ("empty-state", ADVANCE, JSON_TYPE, jsonb({"state": [], "t": 1}), 422,
     r"`state` has shape \(0,\); this bundle's state has 2 components"),
    ("empty-batch-row", ADVANCE, JSON_TYPE, jsonb({"state": [[]], "t": 1}), 422,
     r"`state` has shape \(1, 0\); this bundle's state has 2 components"),
    ("batch-over-limit", ADVANCE, JSON_TYPE, jsonb({"state": [[1, 0]] * 5, "t": 1}), 422,
     r"`state` holds 5 states; the limit is 4 \(`max_batch`\)\."),
    ("body-not-object", ADVANCE, JSON_TYPE, jsonb([1, 0]), 422,
     r"the request body must be an object; got a list of 2 items"),
    ("unknown-field", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0], "t": 1, "time": 2}), 422,
     r"unknown fields \['time'\]"),
    ("missing-field", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0]}), 422,
     r"lacks the required fields \['t'\]"),
    ("bad-off-grid", ADVANCE, JSON_TYPE, jsonb({"state": [1, 0], "t": 1, "off_grid": "cubic"}),
     422, r"`off_grid` is 'cubic'; expected one of \['interpolate', 'nearest', 'error'\]\."),
    ("float32-overflow", ADVANCE, JSON_TYPE, jsonb({"state": [1e300, 0], "t": 1}), 422,
     r"too large for float32"),
    ("typed-bad-dtype", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<i4", [2], b"\x00" * 8), "t": 1.0}), 422,
     r"`state.dtype` is the string '<i4'; expected '<f4' or '<f8'"),
    ("typed-big-endian", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed(">f4", [2], b"\x00" * 8), "t": 1.0}), 422, r"expected '<f4' or"),
    ("typed-length-mismatch", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<f4", [2], b"\x00" * 12), "t": 1.0}), 422,
     r"holds 12 bytes; shape \[2\] of <f4 needs 8 bytes"),
    ("typed-bad-shape", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<f4", [-2], b""), "t": 1.0}), 422, r"`state.shape` is \[-2\]"),
    ("typed-data-not-bytes", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<f4", [2], "abcdefgh"), "t": 1.0}), 422, r"expected MessagePack bin"),
    ("typed-extra-key", ADVANCE, MSGPACK_TYPE,
     packed({"state": {**typed("<f4", [2], STATE_F4.tobytes()), "order": "C"}, "t": 1.0}),
     422, r"unknown fields \['order'\]"),
    ("typed-nan", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<f4", [2], np.asarray([np.nan, 0], "<f4").tobytes()), "t": 1.0}),
     422, r"`state` holds nan at index \[0\]"),
    ("typed-empty-batch", ADVANCE, MSGPACK_TYPE,
     packed({"state": typed("<f4", [0, 2], b""), "t": 1.0}), 422,
     r"`state` is an empty batch \(shape \(0, 2\)\); expected at least one state\."),
    ("msgpack-nan-t", ADVANCE, MSGPACK_TYPE, packed({"state": [1.0, 0.0], "t": float("nan")}),
     422, r"`t` is nan; expected a finite time ≥ 0 \(in s\)\."),
    ("huge-integer-t", ADVANCE, JSON_TYPE, b'{"state": [1, 0], "t": 1' + b"0" * 400 + b"}", 422,
     r"`t` is an integer too large for a float; expected a finite time ≥ 0"),
    ("msgpack-nan-times", FORECAST, MSGPACK_TYPE,
     packed({"state": [1.0, 0.0], "times": [1.0, float("nan")]}), 422,
     r"`times` contains nan; expected finite times ≥ 0\."),
    ("too-many-times", FORECAST, JSON_TYPE, jsonb({"state": [1, 0], "times": list(range(11))}),
     422, r"`times` holds 11 times; the limit is 10 \(`max_forecast_points`\)\."),
    ("empty-times", FORECAST, JSON_TYPE, jsonb({"state": [1, 0], "times": []}), 422,
     r"`times` has shape \(0,\); expected a non-empty 1-D list of times\."),
    ("negative-time", FORECAST, JSON_TYPE, jsonb({"state": [1, 0], "times": [1, -2]}), 422,
     r"`times` contains -2.0; expected finite times ≥ 0\."),
    ("nested-times", FORECAST, JSON_TYPE, jsonb({"state": [1, 0], "times": [[1]]}), 422,
     r"`times` has shape \(1, 1\)"),
    ("unknown-model", "/v1/models/nope/advance", JSON_TYPE, jsonb({"state": [1, 0], "t": 1}), 404,
     r"there is no model 'nope'"),
    ("failed-model", "/v1/models/broken/advance", JSON_TYPE, jsonb({"state": [1, 0], "t": 1}),
     404, r"model 'broken' is not served because it failed to load: the checksum"),
    ("text-plain", ADVANCE, "text/plain", b"state=1", 415,
     r"the Content-Type is 'text/plain'; expected 'application/json' or"),
    ("form-encoded", ADVANCE, "application/x-www-form-urlencoded", b"state=1", 415,
     r"Content-Type is 'application/x-www-form-urlencoded'"),
    ("json-latin1", ADVANCE, "application/json; charset=latin-1", b"{}", 415,
     r"charset 'latin-1'; expected UTF-8"),
    ("body-over-limit", ADVANCE, JSON_TYPE, jsonb({"state": [[1.0, 0.0]] * 400, "t": 1}), 413,
     r"the body is \d+ bytes \(Content-Length\); the limit is 4096 bytes"),
]


def documented_operations() -> list[tuple[str, str]]:
    """(path, METHOD) of every operation in the OpenAPI document of an app that loads nothing
    (its lifespan never runs here)."""
    return [(path, method.upper())
            for path, methods in create_app().openapi()["paths"].items()
            for method in methods]


def _packable(value):
    """Generated data as MessagePack can carry it: integers beyond 64 bits become floats."""
    if isinstance(value, dict):
        return {key: _packable(item) for key, item in value.items()}
    if isinstance(value, list):
        return [_packable(item) for item in value]
    if isinstance(value, int) and not isinstance(value, bool) and not -2**63 <= value < 2**64:
        return float(value)
    return value


def register_msgpack_serializer() -> None:
    """Teach schemathesis to send MessagePack bodies (registering again replaces the same)."""
    import schemathesis

    @schemathesis.serializer("application/msgpack")
    def _msgpack(ctx, value) -> bytes:
        return msgpack.packb(_packable(value), use_bin_type=True)
