"""What every JSON blueprint shares: the answer shapes, the common errors, request reading.

One success shape ``{"ok": true, ...}`` and one error shape
``{"ok": false, "error": {"code", "message", "field"?}}`` (docs/design.md
section 5, docs/api.md). Strict JSON: numpy values made plain, NaN and
infinities as null.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
import orjson
import pandas as pd
from flask import Blueprint, Flask, Response, current_app, request
from werkzeug.exceptions import NotFound, RequestEntityTooLarge
from werkzeug.routing import BaseConverter

from analysis.errors import InputError
from webapp import auth
from webapp.services import ingest
from webapp.services.review_rules import ReviewRefused
from webapp.store import ids

API_PREFIX = "/api/v1"
MULTIPART_ALLOWANCE = 1024**2  # room for the multipart envelope around the file
# Limits on a JSON request body. RFC 8259 section 9: a parser may limit the size of
# texts it accepts and the depth of nesting. 32 levels is far more than any body this
# app reads (a Dash callback nests under 15); 1 MiB holds ~50,000 sample ids (common practice).
MAX_JSON_DEPTH = 32
MAX_JSON_BYTES = 1024**2
JSON_READ = "latentdesk.json"  # where read_json keeps the checked body (request.environ: one per request)
JSON_TYPES = {dict: "an object", list: "an array", str: "a string", bool: "true or false", int: "a number",
              float: "a number", type(None): "null"}
HTTP_CODES = {
    400: "bad_request",
    401: "unauthenticated",
    403: "forbidden",
    404: "not_found",
    405: "method_not_allowed",
    409: "conflict",
    413: "too_large",
    415: "unsupported_media_type",
    429: "too_many_requests",
}


JSON_OPTIONS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS


def _plain(value: Any) -> Any:
    """orjson's ``default``: what it does not write itself (pandas' missing values, numpy arrays
    of another byte order or dtype) as plain values."""
    if value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON")


def json_text(value: Any) -> bytes:
    """``value`` as strict JSON (UTF-8 bytes): numpy values plain, NaN and infinities as null.

    orjson writes floats as the shortest text that reads back to the same
    double (as Python's ``repr``), so every number survives the round trip
    exactly; large tables encode several times faster than with ``json``.
    """
    return orjson.dumps(value, default=_plain, option=JSON_OPTIONS)


def json_response(body: dict[str, Any], status: int) -> Response:
    """``body`` as strict JSON with ``status``."""
    return Response(json_text(body) + b"\n", status=status, mimetype="application/json")


def json_ok(status: int = 200, **payload: Any) -> Response:
    """``{"ok": true, **payload}`` with ``status``."""
    return json_response({"ok": True, **payload}, status)


def revalidated(response: Response) -> Response:
    """A 200 answer of an immutable resource (a fitted model and its tables, named by its
    fingerprint) with a strong ETag (SHA-256 of the body) and ``Cache-Control: private,
    no-cache``: a client may keep it and revalidates with ``If-None-Match``, answered 304 without
    the body (RFC 9110 sections 8.8.3 and 13.1.2; RFC 9111 section 5.2.2.4)."""
    if response.status_code != 200 or response.direct_passthrough:
        return response
    if not response.get_etag()[0]:
        response.set_etag(hashlib.sha256(response.get_data()).hexdigest())
    response.headers["Cache-Control"] = "private, no-cache"
    return response.make_conditional(request)


def json_error(code: str, message: str, status: int, *, field: str | None = None) -> Response:
    """``{"ok": false, "error": {"code", "message"}}`` with ``status``; ``field`` names the
    JSON key at fault when one is known."""
    error = {"code": code, "message": str(message)}
    if field:
        error["field"] = field
    return json_response({"ok": False, "error": error}, status)


# --- errors every blueprint answers alike --------------------------------------------------


class JsonBodyTooLarge(InputError):
    """A JSON request body past ``MAX_JSON_BYTES`` (answered 413, RFC 9110 section 15.5.14)."""


def _input_error(exc: InputError):
    return json_error("bad_input", str(exc), 400, field=exc.field)


def _json_too_large(exc: JsonBodyTooLarge):
    return json_error("too_large", str(exc), 413)


def _no_dataset(exc):
    return json_error("not_found", f"no dataset with id {exc.args[0]}", 404)


def _refused(exc: ReviewRefused):
    return json_error(exc.code, str(exc), exc.status)


def register_common_errors(blueprint: Blueprint) -> None:
    """Bad input (400; a JSON body too large, 413), an unknown dataset (404) and a refused
    review action (its own status)."""
    blueprint.register_error_handler(InputError, _input_error)
    blueprint.register_error_handler(JsonBodyTooLarge, _json_too_large)
    blueprint.register_error_handler(ingest.DatasetNotFound, _no_dataset)
    blueprint.register_error_handler(ReviewRefused, _refused)


def register_not_found(blueprint: Blueprint, error: type[Exception], what: str) -> None:
    """Answer ``error`` (raised with the id as its first argument) as 'no <what> with id N', 404."""
    def not_found(exc):
        return json_error("not_found", f"no {what} with id {exc.args[0]}", 404)

    blueprint.register_error_handler(error, not_found)


# --- ids in URLs ---------------------------------------------------------------------------


class IdConverter(BaseConverter):
    """``<id:name>`` in a route: a row id spelled as ``webapp.store.ids`` says (ASCII digits,
    no sign or leading zero, 1 to ``MAX_ID``). Any other text in that place is a 404 naming
    the value, whatever the method, before the view (and its role check) runs.

    Werkzeug's own ``int`` converter takes any length of digits, and its ``\\d`` also
    Arabic-Indic and full-width ones, so an id past 64 bits reached the database and failed
    there (OWASP Input Validation Cheat Sheet: validate syntax and range before use). The
    converter matches the whole path part and raises NotFound itself: a ValidationError
    would answer 405 where a sibling rule takes another method.
    """

    regex = "[^/]+"
    weight = 50  # as Werkzeug's number converters: ranks before a catch-all
    part_isolating = True

    def to_python(self, value: str) -> int:
        parsed = ids.parse_id(value)
        if parsed is None:
            raise NotAnId(f"{value[:40]!r} is not an id: ids are whole numbers from 1 to {ids.MAX_ID}, "
                          "written in ASCII digits")
        return parsed

    def to_url(self, value) -> str:
        if not ids.is_id(value):
            raise ValueError(f"{value!r} is not a row id")
        return str(value)


class NotAnId(NotFound):
    """A URL's id part that no row can have; answered 404 with the value named."""


def _not_an_id(exc: NotAnId):
    return auth.denial(404, exc.description)


def install_request_checks(app: Flask) -> None:
    """Before the blueprints are registered: ``<id:...>`` for routes, the JSON body checks
    (a ``before_request`` hook, after the sign-in check) and the 404 for a bad URL id."""
    app.url_map.converters["id"] = IdConverter
    app.before_request(refuse_unreadable_json)
    app.register_error_handler(NotAnId, _not_an_id)


def query_id(name: str) -> int | None:
    """The id in query parameter ``name`` (None when absent or empty); InputError naming
    ``name`` when it is not an id (``webapp.store.ids.parse_id``)."""
    text = request.args.get(name)
    if not text:
        return None
    parsed = ids.parse_id(text)
    if parsed is None:
        raise InputError(f"'{name}' must be an id, a whole number from 1 to {ids.MAX_ID}, got {text[:40]!r}",
                         field=name)
    return parsed


def too_large_message() -> str:
    limit = current_app.config.get("MAX_UPLOAD_MB")
    return f"the upload is larger than the limit of {limit} MB (LATENTDESK_MAX_UPLOAD_MB)"


# --- who is asking, and what they sent ----------------------------------------------------


def requires(role: str):
    """Route decorator: 401 without a user, 403 below ``role`` (``webapp.auth`` decides)."""
    return auth.role_required(role)


def form_text(name: str) -> str | None:
    """A form field with blanks trimmed; None when absent or empty."""
    return (request.form.get(name) or "").strip() or None


def json_depth(value: Any) -> int:
    """How deeply ``value`` nests arrays and objects: 0 for a scalar, 1 for ``[1]`` or ``{}``,
    2 for ``{"a": [1]}``. Walked with a stack, not recursion."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, level = stack.pop()
        if not isinstance(item, (dict, list)):
            continue
        deepest = max(deepest, level)
        children = item.values() if isinstance(item, dict) else item
        stack.extend((child, level + 1) for child in children if isinstance(child, (dict, list)))
    return deepest


def read_json() -> Any:
    """The request's JSON value, or None when no JSON was sent; read and checked once a request.

    Raises JsonBodyTooLarge for a body under /api/ larger than ``MAX_JSON_BYTES``, and
    InputError for text that is not JSON or nests deeper than ``MAX_JSON_DEPTH``
    (RFC 8259 section 9 lets a parser limit both).
    """
    if JSON_READ in request.environ:
        return request.environ[JSON_READ]
    if request.path.startswith("/api/"):
        request.max_content_length = MAX_JSON_BYTES  # larger bodies raise RequestEntityTooLarge on reading
    try:
        value = request.get_json(silent=True)
        sent = value is not None or bool(request.get_data())
    except RequestEntityTooLarge:
        limit = request.max_content_length or MAX_JSON_BYTES
        raise JsonBodyTooLarge(f"the request body is larger than the limit of {limit // 1024} KiB") from None
    except RecursionError:  # json's parser gives up near Python's recursion limit (~1000 levels)
        raise InputError(f"the request body is nested too deeply to read; the limit is {MAX_JSON_DEPTH} levels "
                         "of arrays and objects") from None
    if value is None and sent:
        raise InputError("the request body is not valid JSON")
    depth = json_depth(value)
    if depth > MAX_JSON_DEPTH:
        raise InputError(f"the request body is nested too deeply: {depth} levels of arrays and objects; "
                         f"the limit is {MAX_JSON_DEPTH}")
    request.environ[JSON_READ] = value
    return value


def refuse_unreadable_json():
    """``before_request`` hook: a JSON body that is too large (413), nests too deeply or is not
    JSON (400) is answered before any view, the Dash callbacks too, reads it."""
    if not request.is_json:
        return None
    try:
        read_json()
    except JsonBodyTooLarge as exc:
        return _json_too_large(exc)
    except InputError as exc:
        return json_error("bad_input", str(exc), 400)
    return None


def json_body(allowed: set[str] | None = None, required: tuple[str, ...] = ()) -> dict[str, Any]:
    """The JSON object sent (``{}`` for none); with ``allowed``, unknown keys are refused and
    every ``required`` key must be there."""
    body = read_json()
    if body is None:
        body = {}
    if not isinstance(body, dict):
        raise InputError(f"the request body must be a JSON object {{...}}, got {JSON_TYPES[type(body)]}")
    if allowed is not None:
        unknown = sorted(set(body) - allowed)
        if unknown:
            raise InputError(f"unknown field(s): {', '.join(unknown)}; send only {', '.join(sorted(allowed))}",
                             field=unknown[0])
    for name in required:
        if name not in body:
            raise InputError(f"{name} is missing from the request body", field=name)
    return body
