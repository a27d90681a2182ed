"""Home: the dataset list, and a quick upload for analysts.

Upload hands the bytes to ``webapp.services.ingest.ingest_upload``; a refused
file shows the intake's own message and stores nothing.
"""

from __future__ import annotations

import base64
import binascii

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask import current_app
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.web.ui import ids
from webapp.auth.projects import visible_projects

dash.register_page(__name__, path="/", name="Datasets", title="Datasets · LatentDesk", nav=True, order=0)


def _dataset_rows() -> list[dict]:
    from webapp.services.ingest import list_datasets

    return list_datasets(visible_projects(current_user))


def dataset_table(datasets: list[dict]) -> html.Div:
    """The dataset list; names are user text and rendered as text only."""
    if not datasets:
        return html.P("No datasets yet.", className="ld-muted")
    header = html.Tr(
        [html.Th("Name"), html.Th("Samples", className="ld-num"), html.Th("Variables", className="ld-num"),
         html.Th("Uploaded"), html.Th("SHA-256")]
    )
    rows = [
        html.Tr(
            [
                html.Td(dcc.Link(d["name"], href=url_state.dataset_url(d["id"]))),
                html.Td(d["n_samples"], className="ld-num"),
                html.Td(d["n_variables"], className="ld-num"),
                html.Td((d.get("created_at") or "")[:16].replace("T", " ") + " UTC", className="ld-muted"),
                html.Td(d["sha256"][:12], title=d["sha256"], className="ld-muted"),
            ]
        )
        for d in datasets
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def _upload_panel() -> html.Section:
    limit_mb = current_app.config["MAX_UPLOAD_MB"]
    return html.Section(
        [
            html.H2("Add a dataset"),
            dcc.Upload(
                html.Div(["Drop a CSV, TSV or XLSX file here, or ", html.U("choose a file")]),
                id=ids.HOME_UPLOAD,
                className="ld-upload",
                max_size=limit_mb * 1024**2,
                multiple=False,
            ),
            html.P(
                f"Rows are samples, columns are variables; up to {limit_mb} MB. "
                "The file is stored unchanged and known by its SHA-256.",
                className="ld-muted",
            ),
            html.Div(id=ids.HOME_UPLOAD_MESSAGE, role="status"),
        ],
        className="ld-panel",
    )


def layout(**_query) -> html.Div:
    can_upload = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return html.Div(
        [
            html.H1("Datasets"),
            _upload_panel() if can_upload else html.Div(id=ids.HOME_UPLOAD_MESSAGE),
            html.Section(
                html.Div(dataset_table(_dataset_rows()), id=ids.HOME_DATASET_LIST),
                className="ld-panel",
            ),
        ]
    )


def _decode(contents: str) -> bytes:
    try:
        return base64.b64decode(contents.split(",", 1)[1], validate=True)
    except (IndexError, binascii.Error):
        raise InputError("the browser sent the file in an unreadable form; try again") from None


@callback(
    Output(ids.HOME_UPLOAD_MESSAGE, "children"),
    Output(ids.HOME_DATASET_LIST, "children"),
    Input(ids.HOME_UPLOAD, "contents"),
    State(ids.HOME_UPLOAD, "filename"),
    prevent_initial_call=True,
)
def upload(contents: str | None, filename: str | None):
    if not contents:
        return no_update, no_update
    if not auth.has_role(current_user.role, "analyst"):
        return html.P("Your role cannot add datasets.", className="ld-alert"), no_update
    from webapp.services.ingest import ingest_upload

    try:
        dataset = ingest_upload(_decode(contents), filename or "upload", current_user.id)
    except InputError as exc:
        return html.P(f"{filename}: {exc}", className="ld-alert"), no_update
    verb = "Added" if dataset.get("created", True) else "Already here:"
    message = html.P(
        [f"{verb} {dataset['name']} ({dataset['n_samples']} samples x {dataset['n_variables']} variables). ",
         dcc.Link("Open it", href=url_state.dataset_url(dataset["id"]))],
        className="ld-success",
    )
    return message, dataset_table(_dataset_rows())
