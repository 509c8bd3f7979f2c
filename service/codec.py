"""Request and response encodings: JSON and MessagePack, decoded safely.

Bodies are parsed here rather than by FastAPI so that NaN, infinity, deep nesting, trailing
bytes and MessagePack extension types are refused with a 4xx that names the problem.
"""

from __future__ import annotations

import json
import math
from typing import Any

import msgpack
import numpy as np
from fastapi import Request
from starlette.responses import Response

JSON_MEDIA = "application/json"
MSGPACK_MEDIA = "application/msgpack"
# Names MessagePack travelled under before application/msgpack was registered.
_MSGPACK_ALIASES = frozenset({MSGPACK_MEDIA, "application/x-msgpack", "application/vnd.msgpack"})
_LEAF_TYPES = (str, bytes, int, float, bool, type(None))
LITTLE_ENDIAN_DTYPES = {"<f4": np.dtype("<f4"), "<f8": np.dtype("<f8")}


class DecodeError(ValueError):
    """A body that cannot be decoded; `status` is 400, 415 or 422."""

    def __init__(self, status: int, message: str):
        super().__init__(message)
        self.status = status
        self.message = message


def media_type(content_type: str | None) -> str:
    """The bare, lower-case media type of a Content-Type header value ("" when absent)."""
    return (content_type or "").split(";", 1)[0].strip().lower()


def decode_body(content_type: str | None, body: bytes, *, max_depth: int,
                any_type_is_json: bool = False) -> Any:
    """Decode a request body according to its Content-Type.

    A body without a Content-Type is read as JSON. With `any_type_is_json` (the inference
    protocol's route, whose clients send bodies as `application/octet-stream`, form data or
    untyped), every type other than MessagePack is read as JSON too.

    Parameters
    ----------
    content_type : str or None
        The request's Content-Type header.
    body : bytes
        The complete body (its size was checked while reading).
    max_depth : int
        Deepest nesting of lists/objects/maps accepted.

    Raises
    ------
    DecodeError
        415 for an unsupported type, 400 for malformed input, 422 for non-finite numbers.
    """
    kind = media_type(content_type)
    if kind == "" or (any_type_is_json and kind not in _MSGPACK_ALIASES):
        document = _decode_json(body)
    elif kind == JSON_MEDIA:
        charset = _parameter(content_type or "", "charset")
        if charset not in (None, "utf-8", "utf8"):
            raise DecodeError(415, f"the JSON body has charset {charset!r}; expected UTF-8.")
        document = _decode_json(body)
    elif kind in _MSGPACK_ALIASES:
        document = _decode_msgpack(body)
    else:
        shown = repr(content_type) if content_type else "missing"
        raise DecodeError(
            415, f"the Content-Type is {shown}; expected {JSON_MEDIA!r} or {MSGPACK_MEDIA!r}."
        )
    check_structure(document, max_depth=max_depth)
    return document


def _parameter(content_type: str, name: str) -> str | None:
    for part in content_type.split(";")[1:]:
        key, _, value = part.partition("=")
        if key.strip().lower() == name:
            return value.strip().strip('"').lower()
    return None


def _refuse_constant(name: str) -> float:
    raise DecodeError(422, f"the JSON body contains {name}; only finite numbers are allowed.")


def _decode_json(body: bytes) -> Any:
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as error:
        raise DecodeError(400, f"the JSON body is not valid UTF-8: {error}.") from error
    try:
        return json.loads(text, parse_constant=_refuse_constant)
    except RecursionError as error:
        raise DecodeError(400, "the JSON body is nested too deeply.") from error
    except DecodeError:
        raise
    except ValueError as error:  # JSONDecodeError, or an integer literal too long to parse
        raise DecodeError(400, f"the body is not valid JSON: {error}.") from error


def _refuse_extension(code: int, data: bytes) -> Any:
    raise DecodeError(400, f"the MessagePack body holds extension type {code}; extension "
                           "types are not accepted.")


def _decode_msgpack(body: bytes) -> Any:
    size = len(body)
    try:
        return msgpack.unpackb(
            body, raw=False, strict_map_key=True, ext_hook=_refuse_extension, use_list=True,
            # Bound every container by the body size so a forged header cannot make the
            # decoder allocate more than the body could hold.
            max_str_len=size, max_bin_len=size, max_array_len=size, max_map_len=size // 2,
            max_ext_len=size,  # extensions reach `_refuse_extension`, which names them
        )
    except DecodeError:
        raise
    except msgpack.ExtraData as error:
        raise DecodeError(400, "the MessagePack body has trailing bytes after the first "
                               "object; send exactly one object.") from error
    except (msgpack.UnpackException, ValueError, TypeError, RecursionError) as error:
        # Some decoder errors carry no text (e.g. the C decoder's own nesting limit).
        detail = str(error) or f"{type(error).__name__} (nested too deeply or malformed)"
        raise DecodeError(400, f"the body is not valid MessagePack: {detail}.") from error


def check_structure(document: Any, *, max_depth: int) -> None:
    """Refuse nesting deeper than `max_depth` and any value that is not plain data.

    Walks iteratively, so no recursion limit is involved; map keys are already strings.
    """
    stack = [(document, 1)]
    while stack:
        value, depth = stack.pop()
        if isinstance(value, list | dict):
            if depth > max_depth:
                raise DecodeError(
                    400, f"the body is nested more than {max_depth} levels deep; refused."
                )
            children = value.values() if isinstance(value, dict) else value
            stack.extend((child, depth + 1) for child in children
                         if isinstance(child, list | dict) or not isinstance(child, _LEAF_TYPES))
        elif not isinstance(value, _LEAF_TYPES):
            # e.g. msgpack.Timestamp, which the decoder builds without the ext hook
            raise DecodeError(
                400, f"the body holds a value of type {type(value).__name__}; expected numbers, "
                     "strings, bytes, booleans, null, lists and maps only."
            )


def preferred_media(accept: str | None) -> str:
    """Pick JSON or MessagePack from an Accept header; JSON unless MessagePack is preferred."""
    if not accept:
        return JSON_MEDIA
    best: dict[str, tuple[float, int, int]] = {}
    for position, item in enumerate(accept.split(",")):
        kind = media_type(item)
        quality = _quality(item)
        for candidate, aliases in ((JSON_MEDIA, {JSON_MEDIA}), (MSGPACK_MEDIA, _MSGPACK_ALIASES)):
            if kind in aliases:
                specificity = 2
            elif kind in ("application/*", "*/*"):
                specificity = 1 if kind == "application/*" else 0
            else:
                continue
            previous = best.get(candidate)
            if previous is None or specificity > previous[1]:
                best[candidate] = (quality, specificity, -position)
    json_rank = best.get(JSON_MEDIA, (0.0, -1, 0))
    msgpack_rank = best.get(MSGPACK_MEDIA, (0.0, -1, 0))
    if msgpack_rank[0] > json_rank[0]:
        return MSGPACK_MEDIA
    if msgpack_rank[0] == json_rank[0] > 0 and msgpack_rank[1:] > json_rank[1:]:
        return MSGPACK_MEDIA
    return JSON_MEDIA


def _quality(item: str) -> float:
    value = _parameter(item, "q")
    if value is None:
        return 1.0
    try:
        quality = float(value)
    except ValueError:
        return 0.0
    return quality if math.isfinite(quality) and 0.0 <= quality <= 1.0 else 0.0


def _json_default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot encode {type(value).__name__} as JSON")


def typed_array(array: np.ndarray) -> dict[str, Any]:
    """The MessagePack form of an array: little-endian dtype, shape and row-major bytes."""
    little = array.astype(array.dtype.newbyteorder("<"), copy=False)
    return {"dtype": little.dtype.str, "shape": list(array.shape),
            "data": np.ascontiguousarray(little).tobytes()}


def _msgpack_default(value: Any) -> Any:
    if isinstance(value, np.ndarray):
        return typed_array(value)
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"cannot encode {type(value).__name__} as MessagePack")


def encode(document: Any, media: str) -> bytes:
    """Serialise a response document; NumPy arrays become lists (JSON) or typed arrays."""
    if media == MSGPACK_MEDIA:
        return msgpack.packb(document, default=_msgpack_default, use_bin_type=True)
    return json.dumps(document, default=_json_default, allow_nan=False,
                      separators=(",", ":")).encode("utf-8")


def response_media(request: Request) -> str:
    """The encoding `request` accepts: MessagePack if preferred, else JSON."""
    return preferred_media(request.headers.get("accept"))


def encoded_response(body: bytes, media: str, *, status: int = 200,
                     headers: dict[str, str] | None = None) -> Response:
    """A response around a body already encoded as `media`."""
    return Response(body, status_code=status, media_type=media,
                    headers={"Vary": "Accept, Accept-Encoding", **(headers or {})})


def encode_response(request: Request, document: Any, *, status: int = 200,
                    headers: dict[str, str] | None = None) -> Response:
    """A response in the encoding `request` accepts (JSON by default)."""
    media = response_media(request)
    return encoded_response(encode(document, media), media, status=status, headers=headers)
