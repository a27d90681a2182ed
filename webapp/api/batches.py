"""Batches API (``/api/v1``): new samples checked against an approved reference model.

Same shapes as ``webapp.api.datasets`` (``json_ok`` / ``json_error``); routes
call ``webapp.services.batches`` only.  Roles: viewers read; analysts upload
batches; reviewers sign outcomes with a re-entered password.
"""

from __future__ import annotations

from flask import Blueprint, Response, request

from analysis.errors import InputError
from webapp.api.responses import (
    API_PREFIX,
    MULTIPART_ALLOWANCE,
    form_text,
    json_body,
    json_error,
    json_ok,
    register_common_errors,
    register_not_found,
    requires,
    too_large_message,
)
from webapp.auth import api_user
from webapp.services import batches
from webapp.services import reference_models as reference
from webapp.services.context import max_upload_bytes
from webapp.services.exports import to_csv_bytes

bp = Blueprint("api_batches", __name__)
OUTCOME_FIELDS = {"samples", "outcome", "reason", "cause", "password"}
TRUE, FALSE = {"1", "true", "yes", "on"}, {"", "0", "false", "no", "off"}
register_common_errors(bp)


register_not_found(bp, reference.ReferenceModelNotFound, "reference model")
register_not_found(bp, batches.BatchNotFound, "batch")


@bp.errorhandler(batches.BatchSampleNotFound)
def _no_sample(exc):
    return json_error("not_found", f"no sample with id {exc.args[0]!r} in this batch", 404)


def _csv(frame, filename: str) -> Response:
    return Response(to_csv_bytes(frame), mimetype="text/csv",
                    headers={"Content-Disposition": f'attachment; filename="{filename}"'})


def _retest() -> bool:
    value = (request.form.get("retest") or "").strip().lower()
    if value not in TRUE | FALSE:
        raise InputError(f"retest must be true or false, got {value[:20]!r}", field="retest")
    return value in TRUE


@bp.post(f"{API_PREFIX}/reference-models/<id:reference_model_id>/batches")
@requires("analyst")
def check_batch(reference_model_id: int):
    request.max_content_length = max_upload_bytes() + MULTIPART_ALLOWANCE
    upload = request.files.get("file")
    if upload is None:
        return json_error("bad_input", "send the file of new samples as the multipart field 'file'", 400,
                          field="file")
    raw = upload.read()
    if len(raw) > max_upload_bytes():
        return json_error("too_large", too_large_message(), 413)
    options = {"id_column": form_text("id_column"), "sheet": form_text("sheet")}
    for name in ("below_limit", "bad_cells"):
        if form_text(name):
            options[name] = form_text(name)
    batch = batches.check_batch(reference_model_id, raw, upload.filename or "", api_user(), retest=_retest(),
                                **options)
    return json_ok(status=201, batch=batch)


@bp.get(f"{API_PREFIX}/batches/<id:batch_id>")
@requires("viewer")
def get_batch(batch_id: int):
    return json_ok(batch=batches.batch_info(batch_id))


@bp.get(f"{API_PREFIX}/batches/<id:batch_id>/samples.csv")
@requires("viewer")
def batch_samples_csv(batch_id: int):
    return _csv(batches.batch_samples_frame(batch_id), f"batch-{batch_id}-samples.csv")


@bp.get(f"{API_PREFIX}/batches/<id:batch_id>/contributions/<path:sample_id>")
@requires("viewer")
def sample_contributions(batch_id: int, sample_id: str):
    return json_ok(**batches.sample_contributions(batch_id, sample_id))


@bp.get(f"{API_PREFIX}/reference-models/<id:reference_model_id>/chart")
@requires("viewer")
def chart(reference_model_id: int):
    derived = request.args.get("derived") or None
    return json_ok(chart=batches.chart(reference_model_id, derived=derived))


@bp.get(f"{API_PREFIX}/reference-models/<id:reference_model_id>/chart.csv")
@requires("viewer")
def chart_csv(reference_model_id: int):
    return _csv(batches.chart_frame(reference_model_id), f"reference-model-{reference_model_id}-chart.csv")


@bp.post(f"{API_PREFIX}/batches/<id:batch_id>/outcomes")
@requires("reviewer")
def record_outcome(batch_id: int):
    body = json_body(OUTCOME_FIELDS, required=("samples", "outcome", "reason"))
    batch = batches.record_outcome(batch_id, body["samples"], body["outcome"], body["reason"],
                                   body.get("password"), api_user(), cause=body.get("cause"))
    return json_ok(batch=batch)
