"""The JSON API: ``/health`` and ``/api/v1`` for datasets, models and their tables.

One success shape ``{"ok": true, ...}`` and one error shape
``{"ok": false, "error": {"code", "message"}}`` (docs/design.md section 5, docs/api.md).
The shapes and shared errors live in ``webapp.api.responses``. Every error
under ``/api/`` is answered as JSON with a 4xx status for bad input or missing
rights; a file intake refuses is a 400 with intake's message, never a 500.
Routes call services only; user text (ids, column names) goes out as JSON
strings, never as HTML.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from flask import Blueprint, Response, current_app, request
from sqlalchemy import text
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

import analysis
from analysis.errors import InputError
from webapp import auth
from webapp.api.responses import (
    API_PREFIX,
    HTTP_CODES,
    MULTIPART_ALLOWANCE,
    form_text,
    json_body,
    json_error,
    json_response,
    json_ok,
    register_common_errors,
    requires,
    revalidated,
    too_large_message,
)
from webapp.auth.projects import ProjectHidden, acting_user, visible_projects
from webapp.store.ids import parse_id
from webapp.services import ingest, modelling
from webapp.services.context import max_upload_bytes, session_scope
from webapp.services.exports import to_csv_bytes

bp = Blueprint("api", __name__)

def _is_api_path() -> bool:
    return request.path.startswith("/api/") or request.path == "/health"


# --- errors -----------------------------------------------------------------


register_common_errors(bp)


@bp.errorhandler(modelling.ModelNotFound)
def _no_model(exc):
    return json_error("not_found", f"no model with id {exc.args[0]}", 404)


@bp.errorhandler(modelling.SampleNotFound)
def _no_sample(exc):
    return json_error("not_found", f"no sample with id {exc.args[0]!r} in this dataset", 404)


@bp.errorhandler(RequestEntityTooLarge)
def _too_large(exc):
    return json_error("too_large", too_large_message(), 413)


@bp.app_errorhandler(HTTPException)
def _http_error(exc: HTTPException):
    """JSON for every HTTP error under /api/ (also unknown routes and methods)."""
    if not _is_api_path():
        return exc
    status = exc.code or 500
    response = json_error(HTTP_CODES.get(status, "http_error"), exc.description, status)
    if status == 405 and exc.valid_methods:
        response.headers["Allow"] = ", ".join(exc.valid_methods)
    return response


@bp.app_errorhandler(500)
def _internal_error(exc):
    if not _is_api_path():
        return exc
    return json_error("internal", "internal error; the server log has the details", 500)


@bp.after_request
def _no_store(response: Response) -> Response:
    # Answers hold user data; shared caches and the back-forward cache must not keep them.
    response.headers.setdefault("Cache-Control", "no-store")
    return response


# --- auth -------------------------------------------------------------------


def _user_id() -> int:
    return auth.api_user().id


# --- routes -----------------------------------------------------------------


@bp.get("/health")
def health():
    """Liveness and database check; no sign-in needed."""
    try:
        with session_scope() as session:
            session.execute(text("SELECT 1"))
    except Exception:  # noqa: BLE001 - report, do not raise: this is the health check
        current_app.logger.exception("health check: database unreachable")
        return json_error("database_unavailable", "the database does not answer", 503)
    return json_ok(version=analysis.__version__, database="ok")


@bp.post(f"{API_PREFIX}/datasets")
@requires("analyst")
def upload_dataset():
    request.max_content_length = max_upload_bytes() + MULTIPART_ALLOWANCE
    upload = request.files.get("file")
    if upload is None:
        return json_error("bad_input", "send the data file as the multipart field 'file'", 400)
    raw = upload.read()
    if len(raw) > max_upload_bytes():
        return json_error("too_large", too_large_message(), 413)
    options = {
        "id_column": form_text("id_column"),
        "sheet": form_text("sheet"),
        "group_columns": [c.strip() for c in request.form.getlist("group_column") if c.strip()],
    }
    for name in ("below_limit", "bad_cells"):
        if form_text(name):
            options[name] = form_text(name)
    project_id = form_text("project_id")
    if project_id is not None:
        options["project_id"] = parse_id(project_id)
        if options["project_id"] is None:
            return json_error("bad_input", f"project_id {project_id[:40]!r} is not a project id", 400,
                              field="project_id")
        try:
            uploader = acting_user(auth.api_user(), options["project_id"])
        except ProjectHidden:
            return json_error("not_found", f"no project with id {options['project_id']}", 404, field="project_id")
        if not auth.has_role(uploader.role, "analyst"):
            return json_error("forbidden", f"a {uploader.role} in this project cannot add datasets", 403)
    dataset = ingest.ingest_upload(raw, upload.filename or "", _user_id(), **options)
    return json_ok(status=201, dataset=dataset)


@bp.get(f"{API_PREFIX}/datasets")
@requires("viewer")
def list_datasets():
    return json_ok(datasets=ingest.list_datasets(visible_projects(auth.api_user())))


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>")
@requires("viewer")
def get_dataset(dataset_id: int):
    dataset = ingest.dataset_info(dataset_id)
    dataset.pop("stored_path", None)  # a server detail, not part of the contract
    return json_ok(dataset=dataset)


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/models")
@requires("viewer")
def list_models(dataset_id: int):
    return json_ok(dataset_id=dataset_id, models=modelling.recorded_models(dataset_id))


@bp.post(f"{API_PREFIX}/datasets/<id:dataset_id>/models")
@requires("analyst")
def fit_model(dataset_id: int):
    # Without "exclude" the approved exclusions apply; an explicit list is a what-if preview.
    _, info = modelling.get_model(dataset_id, json_body(), user_id=_user_id())
    return json_ok(model=info)


def _confidence_arg() -> float | None:
    value = request.args.get("confidence")
    if value is None:
        return None
    try:
        confidence = float(value)
    except ValueError:
        raise InputError(f"'confidence' must be a number between 0 and 1, got {value!r}") from None
    if not 0 < confidence < 1:
        raise InputError(f"'confidence' must be a number between 0 and 1, got {value!r}")
    return confidence


@bp.get(f"{API_PREFIX}/models/<id:model_id>")
@requires("viewer")
def get_model(model_id: int):
    _, info = modelling.model_by_id(model_id, confidence=_confidence_arg())
    return json_ok(model=info)


def _csv(frame: pd.DataFrame, filename: str) -> Response:
    return Response(
        to_csv_bytes(frame),
        mimetype="text/csv",
        headers={"Content-Disposition": f'attachment; filename="{filename}"'},
    )


def _score_columns(frame: pd.DataFrame) -> list[str]:
    return [c for c in frame.columns if c.startswith("PC") and c[2:].isdigit()]


def _plain(values) -> list:
    """A column as plain Python values, with NaN/inf (and pandas' missing markers) as None."""
    array = np.asarray(values)
    if array.dtype.kind == "f":
        out = array.astype(object)
        out[~np.isfinite(array)] = None
        return out.tolist()
    return pd.Series(values, dtype=object).where(pd.notna(pd.Series(values)), None).tolist()


@bp.get(f"{API_PREFIX}/models/<id:model_id>/samples")
@requires("viewer")
def model_samples(model_id: int):
    frame = modelling.samples_table(model_id, confidence=_confidence_arg())
    info = frame.attrs["model"]
    metadata = list(ingest.dataset_info(info["dataset_id"])["metadata_columns"])
    # Built column by column: one dict per sample, values already plain (100,000 rows stay quick).
    score_rows = _plain(frame[_score_columns(frame)].to_numpy(dtype=float))
    meta_rows = zip(*(_plain(frame[m]) for m in metadata)) if metadata else ([] for _ in range(len(frame)))
    flag_lists = {(False, False): [], (True, False): ["T2"], (False, True): ["SPE"], (True, True): ["T2", "SPE"]}
    flag_rows = map(flag_lists.__getitem__, zip(frame["T2_flag"].tolist(), frame["SPE_flag"].tolist()))
    columns = zip(
        frame["sample_id"].tolist(), meta_rows, frame["excluded"].tolist(), score_rows,
        _plain(frame["T2"]), _plain(frame["T2_limit"]), _plain(frame["SPE"]), _plain(frame["SPE_limit"]), flag_rows,
    )
    samples = [
        {
            "sample_id": sample_id,
            "metadata": dict(zip(metadata, meta)),
            "excluded": excluded,
            "scores": scores,
            "t2": t2,
            "t2_limit": t2_limit,
            "spe": spe,
            "spe_limit": spe_limit,
            "flags": flags,
        }
        for sample_id, meta, excluded, scores, t2, t2_limit, spe, spe_limit, flags in columns
    ]
    body = {"ok": True, "model_id": model_id, "fingerprint": info["fingerprint"], "samples": samples}
    return json_response(body, 200)


@bp.get(f"{API_PREFIX}/models/<id:model_id>/samples.csv")
@requires("viewer")
def model_samples_csv(model_id: int):
    frame = modelling.samples_table(model_id, confidence=_confidence_arg())
    return _csv(frame, f"model-{model_id}-samples.csv")


@bp.get(f"{API_PREFIX}/models/<id:model_id>/variables")
@requires("viewer")
def model_variables(model_id: int):
    frame = modelling.variables_table(model_id)
    columns = _score_columns(frame)
    variables = [
        {
            "variable": row["variable"],
            "loadings": row[columns].to_numpy(dtype=float),
            "explained": row["explained"],
            "log10": bool(row["log10"]),
        }
        for _, row in frame.iterrows()
    ]
    return json_ok(model_id=model_id, fingerprint=frame.attrs["model"]["fingerprint"], variables=variables)


@bp.get(f"{API_PREFIX}/models/<id:model_id>/variables.csv")
@requires("viewer")
def model_variables_csv(model_id: int):
    return _csv(modelling.variables_table(model_id), f"model-{model_id}-variables.csv")


@bp.get(f"{API_PREFIX}/models/<id:model_id>/contributions/<path:sample_id>")
@requires("viewer")
def sample_contributions(model_id: int, sample_id: str):
    result = modelling.contributions(model_id, sample_id, confidence=_confidence_arg())
    return json_ok(model_id=model_id, contributions=result)


FINGERPRINTED = {f"{bp.name}.{name}" for name in ("get_model", "model_samples", "model_samples_csv",
                                                   "model_variables", "model_variables_csv", "sample_contributions")}


@bp.after_request
def _revalidate_models(response):
    """A fitted model never changes (its id names one fingerprint): answers carry an ETag."""
    return revalidated(response) if request.endpoint in FINGERPRINTED else response


ANY_METHOD = ("GET", "POST", "PUT", "PATCH", "DELETE")


@bp.route("/api/<path:unknown>", methods=ANY_METHOD)
def unknown_route(unknown: str):
    """An /api/ path no API route serves: 404 for every method (without this, the pages'
    catch-all route would answer with HTML, or 405 for a POST); a path that another route
    serves with other methods: 405 with ``Allow`` (RFC 9110 section 15.5.6)."""
    allowed = api_methods_of(request.path)
    if allowed:
        answer = json_error("method_not_allowed", f"{request.method} is not allowed here; use "
                            f"{', '.join(allowed)}", 405)
        answer.headers["Allow"] = ", ".join(allowed)
        return answer
    return json_error("not_found", f"no API route /api/{unknown}", 404)


def api_methods_of(path: str) -> list[str]:
    """The methods the API routes other than ``unknown_route`` serve at ``path``."""
    adapter = current_app.url_map.bind("localhost")
    allowed = []
    for method in ANY_METHOD:
        try:
            endpoint, _ = adapter.match(path, method=method)
        except HTTPException:
            continue
        if endpoint != f"{bp.name}.unknown_route":
            allowed.append(method)
    if "GET" in allowed:
        allowed.insert(allowed.index("GET") + 1, "HEAD")
    return allowed
