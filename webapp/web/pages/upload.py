"""The upload page: a file, its intake report, then (only when confirmed) the dataset.

Drop or pick a CSV/TSV/XLSX file; ``webapp.services.ingest.preview_upload``
reads it without storing anything and the page shows what it found: delimiter,
decimal mark, encoding, the role of every column (editable: id, metadata,
variable, ignore), units, missing and below-detection-limit counts, warnings,
or the error with its row and column. "Check again" re-reads with the edited
roles and options; "Store this dataset" calls ``ingest_upload`` and opens the
dataset's page. Column names and messages are shown as text only.
"""

from __future__ import annotations

import base64
import binascii
from typing import Any

import dash
import dash_ag_grid as dag
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from flask import current_app
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp import url_state
from webapp.auth.projects import projects_with_roles
from webapp.web.ui import fields, ids
from webapp.web.ui.grid_options import ONE_TAB_STOP

dash.register_page(__name__, path=url_state.upload_url(), name="Upload", title="Upload · LatentDesk",
                   nav=True, order=1, min_role="analyst")

ROLES = ("id", "metadata", "variable", "ignore")
BELOW_LIMIT = {"half": "LOD / 2", "sqrt2": "LOD / √2", "missing": "leave missing"}
BAD_CELLS = {"error": "refuse the file", "missing": "read as missing"}


# ------------------------------------------------------------ plain parts
def decode_upload(contents: str | None) -> bytes:
    """The file bytes from a dcc.Upload data URL."""
    try:
        return base64.b64decode((contents or "").split(",", 1)[1], validate=True)
    except (IndexError, binascii.Error):
        raise InputError("the browser sent the file in an unreadable form; choose it again") from None


def intake_options(id_column, sheet, below_limit, bad_cells, role_rows) -> dict[str, Any]:
    """Keyword options for preview_upload / ingest_upload from the page's controls."""
    roles = {str(r["column"]): str(r["role"]) for r in (role_rows or []) if r.get("role") in ROLES}
    return {
        "id_column": id_column or None,
        "sheet": (sheet or "").strip() or None,
        "roles": roles or None,
        "below_limit": below_limit or "half",
        "bad_cells": bad_cells or "error",
    }


def role_rows(report: dict) -> list[dict]:
    """One grid row per column of the file: role, unit, missing and below-limit counts."""
    units = report.get("units") or {}
    missing = report.get("missing_counts") or {}
    below = report.get("below_limit_counts") or {}
    above = report.get("above_range_counts") or {}
    return [
        {"column": col, "role": role, "unit": units.get(col, ""), "missing": missing.get(col),
         "below limit": below.get(col), "above range": above.get(col)}
        for col, role in (report.get("roles") or {}).items()
    ]


def _fact(label: str, value) -> html.Div:
    return html.Div([html.Div(label, className="ld-fact-label"), html.Div(str(value), className="ld-fact-value")],
                    className="ld-fact")


def _delimiter_name(delimiter: str | None) -> str:
    return {",": "comma ( , )", ";": "semicolon ( ; )", "\t": "tab", "|": "bar ( | )"}.get(delimiter or "",
                                                                                       repr(delimiter))


def report_view(report: dict) -> html.Div:
    """The intake report as text (facts, warnings); the roles grid sits below it."""
    facts = [
        _fact("File", report.get("filename")),
        _fact("Type", (report.get("file_type") or "").upper()),
        _fact("Samples", report.get("n_samples")),
        _fact("Variables", report.get("n_variables")),
        _fact("Sample ids from", report.get("id_column") or "row numbers"),
    ]
    if report.get("file_type") == "csv":
        facts += [_fact("Delimiter", _delimiter_name(report.get("delimiter"))),
                  _fact("Decimal mark", {",": "comma ( , )", ".": "point ( . )"}.get(report.get("decimal"),
                                                                                  report.get("decimal"))),
                  _fact("Encoding", report.get("encoding"))]
    else:
        facts.append(_fact("Sheet", report.get("sheet") or "first"))
    facts.append(_fact("Below detection limit", BELOW_LIMIT.get(report.get("below_limit_policy"),
                                                                report.get("below_limit_policy"))))
    missing = sum(v or 0 for v in (report.get("missing_counts") or {}).values())
    below = sum(v or 0 for v in (report.get("below_limit_counts") or {}).values())
    facts += [_fact("Missing values", missing), _fact("Below-limit values", below)]
    dropped = report.get("dropped_rows") or []
    warnings = list(report.get("warnings") or [])
    if dropped:
        warnings.append(f"{len(dropped)} empty row(s) skipped: {', '.join(str(r) for r in dropped[:20])}")
    return html.Div(
        [
            html.H2("What the file holds"),
            html.Div(facts, className="ld-report-facts"),
            html.H2("Warnings") if warnings else None,
            html.Ul([html.Li(w) for w in warnings], className="ld-warnings") if warnings else
            html.P("No warnings.", className="ld-muted"),
        ]
    )


def preview(contents, filename, options: dict[str, Any]):
    """(report view, grid rows, id-column options, ok) for an uploaded file; the error as text when unreadable."""
    from webapp.services.ingest import preview_upload

    try:
        report = preview_upload(decode_upload(contents), filename or "upload", **options)
    except InputError as exc:
        return html.Div([html.H2("The file cannot be used as it is"), html.P(str(exc), className="ld-alert")]), \
            None, None, False
    columns = list((report.get("roles") or {}).keys())
    return report_view(report), role_rows(report), [{"label": c, "value": c} for c in columns], True


def store(contents, filename, options: dict[str, Any], user_id: int):
    """(dataset page URL, message) after storing; (None, error text) when refused."""
    from webapp.services.ingest import ingest_upload

    try:
        dataset = ingest_upload(decode_upload(contents), filename or "upload", user_id, **options)
    except InputError as exc:
        return None, str(exc)
    return url_state.dataset_url(dataset["id"]), f"Stored {dataset['name']}."


def _project_choice() -> dcc.Dropdown:
    """The projects the user may add datasets to (analyst or above there); the first one chosen."""
    choices = [(pid, name) for pid, name, role in projects_with_roles(current_user) if auth.has_role(role, "analyst")]
    return dcc.Dropdown(id=ids.UPLOAD_PROJECT, clearable=False, options=[{"label": n, "value": p} for p, n in choices],
                        value=choices[0][0] if choices else None,
                        placeholder="a site admin makes projects" if not choices else None)


# ----------------------------------------------------------------- layout
def layout(**_query) -> html.Div:
    limit_mb = current_app.config["MAX_UPLOAD_MB"]
    radio = {"inline": True, "className": "ld-radio"}
    return html.Div(
        [
            dcc.Location(id=ids.UPLOAD_LOCATION, refresh=True),
            html.H1("Add a dataset"),
            html.Section(
                [
                    dcc.Upload(
                        html.Div(["Drop a CSV, TSV or XLSX file here, or ", html.U("choose a file")]),
                        id=ids.UPLOAD_DROP, className="ld-upload", max_size=limit_mb * 1024**2, multiple=False,
                    ),
                    html.P(f"Rows are samples, columns are variables; up to {limit_mb} MB. Nothing is stored "
                           "until you confirm below.", className="ld-muted"),
                    html.Div(
                        [
                            html.Div(fields.labelled("Project", _project_choice()), className="ld-field"),
                            html.Div(fields.labelled("Sample ids", dcc.Dropdown(
                                id=ids.UPLOAD_ID_COLUMN, placeholder="detect automatically")), className="ld-field"),
                            html.Div(fields.labelled("Sheet (XLSX)", dcc.Input(
                                id=ids.UPLOAD_SHEET, type="text", placeholder="first sheet", debounce=True,
                                className="ld-input")), className="ld-field"),
                            html.Div(fields.labelled("Values below a detection limit", dcc.RadioItems(
                                id=ids.UPLOAD_BELOW_LIMIT, value="half", **radio,
                                options=[{"label": f" {v}", "value": k} for k, v in BELOW_LIMIT.items()])),
                                className="ld-field ld-field-wide"),
                            html.Div(fields.labelled("Text in a numeric column", dcc.RadioItems(
                                id=ids.UPLOAD_BAD_CELLS, value="error", **radio,
                                options=[{"label": f" {v}", "value": k} for k, v in BAD_CELLS.items()])),
                                className="ld-field ld-field-wide"),
                        ],
                        className="ld-settings-row",
                    ),
                ],
                className="ld-panel",
            ),
            dcc.Loading(html.Div(id=ids.UPLOAD_REPORT), type="dot"),
            html.Section(
                [
                    html.H2("Column roles"),
                    html.P("Change a role by clicking it: id (one column of sample ids), metadata (groups, dates, "
                           "notes; used for colours), variable (analysed), ignore. Then check again.",
                           className="ld-muted"),
                    dag.AgGrid(
                        id=ids.UPLOAD_ROLES, rowData=[],
                        columnDefs=[
                            {"field": "column", "headerName": "Column", "pinned": "left", "minWidth": 200},
                            {"field": "role", "headerName": "Role", "editable": True,
                             "cellEditor": "agSelectCellEditor", "cellEditorParams": {"values": list(ROLES)},
                             "cellStyle": {"fontWeight": 600}},
                            {"field": "unit", "headerName": "Unit"},
                            {"field": "missing", "headerName": "Missing", "type": "numericColumn"},
                            {"field": "below limit", "headerName": "Below limit", "type": "numericColumn"},
                            {"field": "above range", "headerName": "Above range", "type": "numericColumn"},
                        ],
                        defaultColDef={"resizable": True, "sortable": False, "minWidth": 90},
                        columnSize="responsiveSizeToFit",
                        dashGridOptions=ONE_TAB_STOP,
                        className="ag-theme-quartz ld-grid",
                        style={"height": "360px"},
                    ),
                    html.Div(
                        [html.Button("Check again", id=ids.UPLOAD_RECHECK, n_clicks=0,
                                     className="ld-button ld-button-quiet"),
                         html.Button("Store this dataset", id=ids.UPLOAD_CONFIRM, n_clicks=0, className="ld-button",
                                     disabled=True)],
                        className="ld-button-row ld-upload-actions",
                    ),
                    html.Div(id=ids.UPLOAD_RESULT, role="status"),
                ],
                className="ld-panel",
            ),
        ],
        className="ld-upload-page",
    )


# --------------------------------------------------------------- callbacks
@callback(
    Output(ids.UPLOAD_REPORT, "children"),
    Output(ids.UPLOAD_ROLES, "rowData"),
    Output(ids.UPLOAD_ID_COLUMN, "options"),
    Output(ids.UPLOAD_CONFIRM, "disabled"),
    Output(ids.UPLOAD_RESULT, "children", allow_duplicate=True),
    Input(ids.UPLOAD_DROP, "contents"),
    Input(ids.UPLOAD_RECHECK, "n_clicks"),
    Input(ids.UPLOAD_ID_COLUMN, "value"),
    Input(ids.UPLOAD_SHEET, "value"),
    Input(ids.UPLOAD_BELOW_LIMIT, "value"),
    Input(ids.UPLOAD_BAD_CELLS, "value"),
    State(ids.UPLOAD_DROP, "filename"),
    State(ids.UPLOAD_ROLES, "rowData"),
    prevent_initial_call=True,
)
def _preview(contents, _recheck, id_column, sheet, below_limit, bad_cells, filename, rows):
    if not contents:
        return no_update, no_update, no_update, True, no_update
    # A new file starts from the roles intake detects; a re-check keeps the edited ones.
    keep_roles = ctx.triggered_id != ids.UPLOAD_DROP
    options = intake_options(id_column if keep_roles else None, sheet, below_limit, bad_cells,
                             rows if keep_roles else None)
    report, new_rows, id_options, ok = preview(contents, filename, options)
    return (report, new_rows if new_rows is not None else [], id_options if id_options is not None else no_update,
            not ok, None)


@callback(
    Output(ids.UPLOAD_LOCATION, "href"),
    Output(ids.UPLOAD_RESULT, "children"),
    Input(ids.UPLOAD_CONFIRM, "n_clicks"),
    State(ids.UPLOAD_DROP, "contents"),
    State(ids.UPLOAD_DROP, "filename"),
    State(ids.UPLOAD_ID_COLUMN, "value"),
    State(ids.UPLOAD_SHEET, "value"),
    State(ids.UPLOAD_BELOW_LIMIT, "value"),
    State(ids.UPLOAD_BAD_CELLS, "value"),
    State(ids.UPLOAD_ROLES, "rowData"),
    State(ids.UPLOAD_PROJECT, "value"),
    prevent_initial_call=True,
)
def _store(clicks, contents, filename, id_column, sheet, below_limit, bad_cells, rows, project_id):
    if not clicks or not contents:
        return no_update, no_update
    if not auth.has_role(current_user.role, "analyst"):  # the role in the chosen project (webapp.auth.projects)
        return no_update, html.P("Your role cannot add datasets to this project.", className="ld-alert")
    options = intake_options(id_column, sheet, below_limit, bad_cells, rows)
    url, message = store(contents, filename, {**options, "project_id": project_id}, current_user.id)
    if url is None:
        return no_update, html.P(message, className="ld-alert")
    return url, html.P(message, className="ld-success")
