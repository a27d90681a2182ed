"""What every JSON blueprint shares: the answer shapes, the common errors, request reading.

One success shape ``{"ok": true, ...}`` and one error shape
``{"ok": false, "error": {"code", "message", "field"?}}`` (docs/design.md
section 5, docs/api.md). Strict JSON: numpy values made plain, NaN and
infinities as null.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd
from flask import Blueprint, Response, current_app, request

from analysis.errors import InputError
from webapp import auth
from webapp.services import ingest
from webapp.services.review_rules import ReviewRefused

API_PREFIX = "/api/v1"
MULTIPART_ALLOWANCE = 1024**2  # room for the multipart envelope around the file
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


def jsonable(value: Any) -> Any:
    """``value`` with numpy types made plain and NaN/inf made null (strict JSON)."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if value is pd.NA or value is pd.NaT:
        return None
    return value


def json_response(body: dict[str, Any], status: int) -> Response:
    """``body`` as strict JSON with ``status`` (callers that built their own plain body)."""
    # Strict JSON (allow_nan=False) and no key sorting: large tables stay fast.
    text = json.dumps(body, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    return Response(text + "\n", status=status, mimetype="application/json")


def json_ok(status: int = 200, **payload: Any) -> Response:
    """``{"ok": true, **payload}`` with ``status``."""
    return json_response({"ok": True, **jsonable(payload)}, status)


def json_error(code: str, message: str, status: int, *, field: str | None = None) -> Response:
    """``{"ok": false, "error": {"code", "message"}}`` with ``status``; ``field`` names the
    JSON key at fault when one is known."""
    error = {"code": code, "message": str(message)}
    if field:
        error["field"] = field
    return json_response({"ok": False, "error": error}, status)


# --- errors every blueprint answers alike --------------------------------------------------


def _input_error(exc: InputError):
    return json_error("bad_input", str(exc), 400, field=exc.field)


def _no_dataset(exc):
    return json_error("not_found", f"no dataset with id {exc.args[0]}", 404)


def _refused(exc: ReviewRefused):
    return json_error(exc.code, str(exc), exc.status)


def register_common_errors(blueprint: Blueprint) -> None:
    """Bad input (400), an unknown dataset (404) and a refused review action (its own status)."""
    blueprint.register_error_handler(InputError, _input_error)
    blueprint.register_error_handler(ingest.DatasetNotFound, _no_dataset)
    blueprint.register_error_handler(ReviewRefused, _refused)


def register_not_found(blueprint: Blueprint, error: type[Exception], what: str) -> None:
    """Answer ``error`` (raised with the id as its first argument) as 'no <what> with id N', 404."""
    def not_found(exc):
        return json_error("not_found", f"no {what} with id {exc.args[0]}", 404)

    blueprint.register_error_handler(error, not_found)


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


def json_body(allowed: set[str] | None = None, required: tuple[str, ...] = ()) -> dict[str, Any]:
    """The JSON object sent (``{}`` for none); with ``allowed``, unknown keys are refused and
    every ``required`` key must be there."""
    try:
        body = request.get_json(silent=True)
    except RecursionError:
        raise InputError("the request body is nested too deeply to read") from None
    if body is None and request.get_data():
        raise InputError("the request body is not valid JSON")
    if body is None:
        body = {}
    if not isinstance(body, dict):
        raise InputError("the request body must be a JSON object")
    if allowed is not None:
        unknown = sorted(set(body) - allowed)
        if unknown:
            raise InputError(f"unknown field(s): {', '.join(unknown)}; send only {', '.join(sorted(allowed))}",
                             field=unknown[0])
    for name in required:
        if name not in body:
            raise InputError(f"{name} is missing from the request body", field=name)
    return body
