"""Bodies in and answers out: JSON or msgpack requests, JSON or msgpack answers, problem details.

JSON is read and written with orjson, several times faster than the standard library on the
bodies this service sees. Every body orjson refuses, or could read differently from the
standard library (integers beyond 64 bits, which it reads as floats), goes through `json`
instead, so what a request means and the errors it gets do not depend on the codec. Answers
are compact UTF-8 JSON; a value orjson cannot encode goes through `json` as well.
"""

from __future__ import annotations

import json
import math
from typing import Any

import msgpack
import orjson
from aiohttp import web
from multidict import CIMultiDict

from .errors import (
    BadRequest,
    InvalidInput,
    PayloadTooLarge,
    ThresherError,
    Unauthorized,
    UnsupportedMedia,
)

MSGPACK = "application/msgpack"
PROBLEM = "application/problem+json"
JSON = "application/json"

# A digit run this long may be an integer outside 64 bits (|n| >= 2**63 has 19 digits or more).
_LONG_INTEGER = b"9" * 19
_DIGITS_ONLY = bytes(57 if 48 <= c <= 57 else 32 for c in range(256))  # digit -> "9", else " "
_ENCODE_OPTIONS = orjson.OPT_NON_STR_KEYS
# Copied into each answer: cheaper than aiohttp working out the header from ``content_type``.
_JSON_HEADERS = CIMultiDict({"Content-Type": JSON})


def decode_json(raw: bytes) -> Any:
    """Parse JSON exactly as ``json.loads`` would (NaN and Infinity refused); ValueError if bad."""
    if _LONG_INTEGER not in raw.translate(_DIGITS_ONLY):
        try:
            return orjson.loads(raw)
        except orjson.JSONDecodeError:
            pass  # json says why, in its own words, or reads what orjson refuses (e.g. a BOM)
    try:
        return json.loads(raw, parse_constant=_reject_constant)
    except RecursionError:
        raise ValueError("nested too deeply") from None


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def encode_json(value: Any) -> bytes:
    """Compact UTF-8 JSON of an answer."""
    try:
        return orjson.dumps(value, option=_ENCODE_OPTIONS)
    except TypeError:  # e.g. an integer over 64 bits: json writes it exactly
        return json.dumps(value, separators=(",", ":"), allow_nan=False).encode()


def wants_msgpack(request: web.Request) -> bool:
    """True when the request's Accept prefers msgpack to JSON."""
    accept = request.headers.get("Accept")
    if not accept or MSGPACK not in accept:
        return False
    return JSON not in accept.split(MSGPACK)[0]


def answer(request: web.Request, body: Any, *, status: int = 200) -> web.Response:
    """JSON, or msgpack when the client's Accept asks for it."""
    if wants_msgpack(request):
        return web.Response(
            body=msgpack.packb(body, use_bin_type=True), status=status, content_type=MSGPACK
        )
    return web.Response(body=encode_json(body), status=status, headers=_JSON_HEADERS)


def problem(error: ThresherError) -> web.Response:
    """The RFC 9457 answer of an error, with Retry-After and WWW-Authenticate where due."""
    response = web.Response(
        text=json.dumps(error.to_problem()), status=error.status, content_type=PROBLEM
    )
    retry = getattr(error, "retry_after", None)
    if retry is not None:
        response.headers["Retry-After"] = str(max(1, math.ceil(retry)))
    if isinstance(error, Unauthorized):
        www = error.extra.get("www_authenticate")
        response.headers["WWW-Authenticate"] = www or 'Bearer realm="thresher"'
    return response


async def read_body(request: web.Request, limit: int) -> Any:
    """Parse a JSON or msgpack body, with errors that say what to send instead."""
    length = request.content_length
    if length is not None and length > limit:
        raise PayloadTooLarge(f"body of {length} bytes is over {limit} bytes")
    ctype = request.content_type
    if ctype != JSON and ctype != MSGPACK:
        raise UnsupportedMedia(
            f"content type {ctype!r} is not read here; send application/json or {MSGPACK}"
        )
    content = request.content
    if length is not None and content.is_eof():
        # The whole body has arrived, its length checked above (the usual case for a small
        # body): take it at once instead of through read()'s loop of awaits.
        raw = content.read_nowait()
    else:
        try:
            raw = await request.read()
        except web.HTTPRequestEntityTooLarge:
            raise PayloadTooLarge(f"body is over the limit of {limit} bytes") from None
    if not raw:
        raise BadRequest("the request body is empty; send a JSON object")
    try:
        if ctype == MSGPACK:
            return msgpack.unpackb(raw, raw=False, strict_map_key=True)
        return decode_json(raw)
    except (ValueError, msgpack.UnpackException, UnicodeDecodeError) as exc:
        kind = "msgpack" if ctype == MSGPACK else "JSON"
        raise BadRequest(f"body is not valid {kind}: {exc}") from None


def require_object(body: Any, *keys: str) -> dict[str, Any]:
    """The body as a JSON object with no keys beyond ``keys``, or InvalidInput."""
    if not isinstance(body, dict):
        raise InvalidInput("the body must be a JSON object", path="")
    for key in body:
        if key not in keys:
            raise InvalidInput(f"unknown key {key!r}; expected {', '.join(keys)}", path=key)
    return body
