"""Monitoring API (``/api/v1``): reference models, their signatures and their model files.

Same shapes as ``webapp.api.datasets`` (``json_ok`` / ``json_error``); routes call
``webapp.services.reference_models`` only.  Roles: viewers read; analysts
propose; reviewers (never on their own proposal) approve, reject and retire.
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, request

from analysis.errors import InputError
from webapp.api.datasets import _json_body, json_error, json_ok, register_common_errors, requires
from webapp.services import modelling
from webapp.services import reference_models as reference
from webapp.services.exports import to_csv_bytes
from webapp.services.review_rules import ReviewRefused

bp = Blueprint("api_monitoring", __name__)
API = "/api/v1"
PROPOSE_FIELDS = {"model_id", "name", "note", "confidence"}
SIGN_FIELDS = {"password", "comment"}
register_common_errors(bp)


@bp.errorhandler(ReviewRefused)
def _refused(exc: ReviewRefused):
    return json_error(exc.code, str(exc), exc.status)


@bp.errorhandler(reference.ReferenceModelNotFound)
def _no_reference_model(exc):
    return json_error("not_found", f"no reference model with id {exc.args[0]}", 404)


@bp.errorhandler(modelling.ModelNotFound)
def _no_model(exc):
    return json_error("not_found", f"model_id {exc.args[0]}: no model with that id", 404, field="model_id")


def _user():
    from webapp.auth import api_user

    return api_user()


def _body(allowed: set[str], required: tuple[str, ...] = ()) -> dict[str, Any]:
    """The JSON object sent, with only ``allowed`` keys and every ``required`` one."""
    try:
        body = _json_body()
    except RecursionError:
        raise InputError("the request body is nested too deeply to read") from None
    unknown = sorted(set(body) - allowed)
    if unknown:
        raise InputError(f"unknown field(s): {', '.join(unknown)}; send only {', '.join(sorted(allowed))}",
                         field=unknown[0])
    for name in required:
        if name not in body:
            raise InputError(f"{name} is missing from the request body", field=name)
    return body


def _states() -> list[str] | None:
    return reference.check_states(request.args.getlist("state"))


# --- proposing and signing ----------------------------------------------------------------


@bp.post(f"{API}/reference-models")
@requires("analyst")
def propose():
    body = _body(PROPOSE_FIELDS, required=("model_id", "name"))
    proposed = reference.propose(
        body["model_id"],
        body["name"],
        body.get("note", ""),
        body.get("confidence", list(reference.DEFAULT_CONFIDENCE)),
        user=_user(),
    )
    return json_ok(status=201, reference_model=proposed)


def _sign(reference_model_id: int, sign):
    body = _body(SIGN_FIELDS)
    signed = sign(reference_model_id, body.get("password"), body.get("comment", ""), user=_user())
    return json_ok(reference_model=signed)


@bp.post(f"{API}/reference-models/<int:reference_model_id>/approve")
@requires("reviewer")
def approve(reference_model_id: int):
    return _sign(reference_model_id, reference.approve)


@bp.post(f"{API}/reference-models/<int:reference_model_id>/reject")
@requires("reviewer")
def reject(reference_model_id: int):
    return _sign(reference_model_id, reference.reject)


@bp.post(f"{API}/reference-models/<int:reference_model_id>/retire")
@requires("reviewer")
def retire(reference_model_id: int):
    return _sign(reference_model_id, reference.retire)


# --- reading ------------------------------------------------------------------------------


@bp.get(f"{API}/reference-models")
@requires("viewer")
def list_reference_models():
    return json_ok(reference_models=reference.list_reference_models(_states()))


@bp.get(f"{API}/reference-models.csv")
@requires("viewer")
def list_reference_models_csv():
    return Response(
        to_csv_bytes(reference.reference_models_frame(_states())),
        mimetype="text/csv",
        headers={"Content-Disposition": 'attachment; filename="reference-models.csv"'},
    )


@bp.get(f"{API}/reference-models/<int:reference_model_id>")
@requires("viewer")
def get_reference_model(reference_model_id: int):
    return json_ok(reference_model=reference.get_reference_model(reference_model_id))


@bp.get(f"{API}/reference-models/<int:reference_model_id>/model.json")
@requires("viewer")
def model_file(reference_model_id: int):
    document = reference.model_document(reference_model_id)
    info = reference.get_reference_model(reference_model_id)
    return Response(
        reference.model_file_bytes(document),
        mimetype="application/json",
        headers={
            "Content-Disposition": f'attachment; filename="{reference.download_name(info)}"',
            "ETag": f'"{info["document_sha256"]}"',
        },
    )
