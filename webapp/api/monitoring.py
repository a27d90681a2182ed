"""Monitoring API (``/api/v1``): reference models, their signatures and their model files.

Same shapes as ``webapp.api.datasets`` (``json_ok`` / ``json_error``); routes call
``webapp.services.reference_models`` only.  Roles: viewers read; analysts
propose; reviewers (never on their own proposal) approve, reject and retire.
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, request

from webapp.api.responses import API_PREFIX, json_body, json_error, json_ok, register_common_errors, register_not_found, requires
from webapp.auth import api_user
from webapp.auth.projects import visible_projects
from webapp.services import modelling
from webapp.services import reference_models as reference
from webapp.services.exports import to_csv_bytes

bp = Blueprint("api_monitoring", __name__)
PROPOSE_FIELDS = {"model_id", "name", "note", "confidence", "run_rules"}
SIGN_FIELDS = {"password", "comment"}
register_common_errors(bp)


register_not_found(bp, reference.ReferenceModelNotFound, "reference model")


@bp.errorhandler(modelling.ModelNotFound)
def _no_model(exc):
    return json_error("not_found", f"model_id {exc.args[0]}: no model with that id", 404, field="model_id")


def _states() -> list[str] | None:
    return reference.check_states(request.args.getlist("state"))


# --- proposing and signing ----------------------------------------------------------------


@bp.post(f"{API_PREFIX}/reference-models")
@requires("analyst")
def propose():
    body = json_body(PROPOSE_FIELDS, required=("model_id", "name"))
    proposed = reference.propose(
        body["model_id"],
        body["name"],
        body.get("note", ""),
        body.get("confidence", list(reference.DEFAULT_CONFIDENCE)),
        user=api_user(),
        run_rules=body.get("run_rules"),
    )
    return json_ok(status=201, reference_model=proposed)


def _sign(reference_model_id: int, sign):
    body = json_body(SIGN_FIELDS)
    signed = sign(reference_model_id, body.get("password"), body.get("comment", ""), user=api_user())
    return json_ok(reference_model=signed)


@bp.post(f"{API_PREFIX}/reference-models/<id:reference_model_id>/approve")
@requires("reviewer")
def approve(reference_model_id: int):
    return _sign(reference_model_id, reference.approve)


@bp.post(f"{API_PREFIX}/reference-models/<id:reference_model_id>/reject")
@requires("reviewer")
def reject(reference_model_id: int):
    return _sign(reference_model_id, reference.reject)


@bp.post(f"{API_PREFIX}/reference-models/<id:reference_model_id>/retire")
@requires("reviewer")
def retire(reference_model_id: int):
    return _sign(reference_model_id, reference.retire)


# --- reading ------------------------------------------------------------------------------


@bp.get(f"{API_PREFIX}/reference-models")
@requires("viewer")
def list_reference_models():
    return json_ok(reference_models=reference.list_reference_models(_states(), visible=visible_projects(api_user())))


@bp.get(f"{API_PREFIX}/reference-models.csv")
@requires("viewer")
def list_reference_models_csv():
    return Response(
        to_csv_bytes(reference.reference_models_frame(_states(), visible=visible_projects(api_user()))),
        mimetype="text/csv",
        headers={"Content-Disposition": 'attachment; filename="reference-models.csv"'},
    )


@bp.get(f"{API_PREFIX}/reference-models/<id:reference_model_id>")
@requires("viewer")
def get_reference_model(reference_model_id: int):
    return json_ok(reference_model=reference.get_reference_model(reference_model_id))


@bp.get(f"{API_PREFIX}/reference-models/<id:reference_model_id>/model.json")
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
