"""Respondent screening API: ``GET /api/v1/datasets/<id>/screening`` and its ``.csv`` twin.

Same shapes as ``webapp.api.datasets`` (``json_ok`` / ``json_error``); the route
calls ``webapp.services.screening`` only. Query ``items=auto`` (the default:
the variables must look like items on one scale, else 422 ``not_items``) or
``items=declared`` (the caller says they are). Viewers and above may read.
"""

from __future__ import annotations

from flask import Blueprint, Response, request

from webapp.api.responses import API_PREFIX, json_error, json_ok, register_common_errors, requires
from webapp.services import screening
from webapp.services.exports import to_csv_bytes

bp = Blueprint("api_screening", __name__)
register_common_errors(bp)


@bp.errorhandler(screening.NotItemScale)
def _not_items(exc: screening.NotItemScale):
    # 422: the request is well formed, but this dataset's content cannot be screened as asked (RFC 9110 15.5.21).
    return json_error("not_items", str(exc), 422, field="items")


@bp.after_request
def _no_store(response: Response) -> Response:
    # Answers hold user data; shared caches and the back-forward cache must not keep them.
    response.headers.setdefault("Cache-Control", "no-store")
    return response


def _screened(dataset_id: int) -> screening.DatasetScreening:
    return screening.screen_dataset(dataset_id, request.args.get("items"))


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/screening")
@requires("viewer")
def dataset_screening(dataset_id: int):
    screened = _screened(dataset_id)
    table = screened.table
    flag_lists = [flags.split("; ") if flags else [] for flags in table["flags"]]
    respondents = [
        {**{key: row[key] for key in ("sample_id", "answered", "long_string", "mean_run", "irv", "distance_sq",
                                      "distance_df", "distance_cutoff")}, "flags": flags}
        for row, flags in zip(table.to_dict("records"), flag_lists)
    ]
    return json_ok(**screened.summary(), respondents=respondents)


@bp.get(f"{API_PREFIX}/datasets/<id:dataset_id>/screening.csv")
@requires("viewer")
def dataset_screening_csv(dataset_id: int):
    return Response(
        to_csv_bytes(_screened(dataset_id).table),
        mimetype="text/csv",
        headers={"Content-Disposition": f'attachment; filename="dataset-{dataset_id}-screening.csv"'},
    )
