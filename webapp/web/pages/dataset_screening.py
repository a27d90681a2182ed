"""The dataset page's "Respondent screening" tab: long string, IRV and robust distance per respondent.

For files whose variables are questionnaire items on one scale (detected by
``analysis.screening.check_item_scale``, or declared by the user with the tick
box). The tab shows the scale check, the cut-offs with their basis, a plot of
the longest run of identical answers against IRV (``screening_figures``), the
table of every respondent (sortable; flags in words) with a filter for the
flagged ones, and a link to the proposal form with the respondents shown (or
the rows ticked) and the reason category "careless response" filled in.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once; ``dataset_views``
imports this module only inside a function, after the loader has run.

Callbacks stay thin: inputs -> ``webapp.services.screening`` -> figure builder;
the plain functions (``screening_view``, ``proposal_link``) are what the tests call.
"""

from __future__ import annotations

from urllib.parse import quote, urlencode

import dash_ag_grid as dag
from dash import Input, Output, State, callback, dcc, html
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth, url_state
from webapp.web.ui import fields, figures, ids, messages, plot_table
from webapp.web.ui.graph_config import GRAPH_CONFIG
from webapp.web.ui.grid_options import ONE_TAB_STOP
from webapp.web.ui.screening_figures import screening_figure

CAUTION = (
    "Screening statistics support, and never replace, QA judgement and local procedures. A flag is a reason "
    "to read a respondent's answers, not a reason to exclude them: a long run can be an honest answer to "
    "similar items, and a misprinted form can make good-faith answers look far off. Regulated use needs the "
    "site's own validation."
)
FILTERS = {"all": "all respondents", "flagged": "flagged by at least one index",
           "two": "flagged by two or more indices"}
MIN_FLAGS = {"all": 0, "flagged": 1, "two": 2}
GRID_ROWS = 5000  # rows sent to the table; the CSV download gives every respondent
HIDDEN = {"display": "none"}
NUMBER = {"type": "numericColumn", "filter": False, "minWidth": 110,
          "valueFormatter": {"function": "params.value == null ? '–' : d3.format('.3~g')(params.value)"}}
COLUMN_DEFS = [
    {"field": "sample_id", "headerName": "Respondent", "pinned": "left", "minWidth": 120},
    {"field": "flags", "headerName": "Flags", "minWidth": 220, "flex": 2},
    {"field": "long_string", "headerName": "Longest run", **NUMBER},
    {"field": "mean_run", "headerName": "Mean run", **NUMBER},
    {"field": "irv", "headerName": "IRV", **NUMBER},
    {"field": "distance_sq", "headerName": "Robust D²", **NUMBER},
    {"field": "distance_cutoff", "headerName": "D² cut-off", **NUMBER},
    {"field": "answered", "headerName": "Answered", **NUMBER},
]
GRID_FIELDS = [c["field"] for c in COLUMN_DEFS] + ["n_flags"]


# ----------------------------------------------------------------- layout
def tab_content() -> list:
    """The tab's components; the callback below fills them for the page's dataset."""
    declared = dcc.Checklist(id=ids.SCREENING_DECLARED, value=[], className="ld-check",
                             options=[{"label": " Treat the variables as items on one scale", "value": "declared"}])
    shown = dcc.RadioItems(id=ids.SCREENING_FILTER, value="all", inline=True, className="ld-radio",
                           options=[{"label": f" {label}", "value": key} for key, label in FILTERS.items()])
    return [html.Div(
        [
            html.P(CAUTION, className="ld-caution"),
            html.Div(id=ids.SCREENING_STATUS, role="status"),
            html.Div(
                [html.Div(fields.labelled("Items", declared), className="ld-field"),
                 html.Div(fields.labelled("Show in the table", shown), className="ld-field")],
                className="ld-toolbar-group",
            ),
            html.Div(id=ids.SCREENING_CUTOFFS),
            plot_table.plot_figure(dcc.Graph(id=ids.SCREENING_PLOT, config=GRAPH_CONFIG,
                                             figure=figures.empty_figure("Screening…"))),
            html.P(id=ids.SCREENING_NOTE, className="ld-muted"),
            dcc.Link("", id=ids.SCREENING_PROPOSE, href="", className="ld-button ld-button-quiet", style=HIDDEN),
            dag.AgGrid(
                id=ids.SCREENING_GRID,
                rowData=[],
                columnDefs=COLUMN_DEFS,
                defaultColDef={"sortable": True, "filter": True, "resizable": True, "minWidth": 100, "flex": 1},
                dashGridOptions={"rowSelection": {"mode": "multiRow", "checkboxes": True, "headerCheckbox": False,
                                                  "enableClickSelection": False},
                                 "animateRows": False, **ONE_TAB_STOP},
                getRowId="params.data.sample_id",
                className="ag-theme-quartz ld-grid",
                style={"height": "480px"},
            ),
        ],
        id=ids.SCREENING_READY,
    )]


# ------------------------------------------------------------ plain parts
def _cutoff_list(summary: dict) -> html.Div:
    return html.Div(
        [html.Strong("Cut-offs"),
         html.Ul([html.Li([html.Span(f"{c['name']}: {c['rule']}. "), html.Span(c["basis"], className="ld-muted")])
                  for c in summary["cutoffs"]])],
        className="ld-region-note",
    )


def _status(summary: dict) -> html.P:
    scale = summary["scale"]
    if summary["items"] == "declared" and not scale["looks_like_items"]:
        text = (f"Screened as declared: {summary['n_items']} variables taken as items on one scale. "
                f"The check alone would not have: {scale['reason']}.")
    elif summary["items"] == "declared":
        text = f"Screened as declared: {scale['reason']}."
    else:
        text = f"The variables look like items on one scale: {scale['reason']}."
    counts = ", ".join(f"{word} {count}" for word, count in summary["flag_counts"].items())
    return html.P(f"{text} {summary['n_flagged']} of {summary['n_respondents']} respondents flagged ({counts}).")


def grid_rows(table, choice: str) -> tuple[list[dict], str]:
    """The table rows the filter ``choice`` shows (most flags first, then by robust D²), and a note."""
    minimum = MIN_FLAGS.get(choice, 0)
    chosen = table[table["n_flags"] >= minimum].sort_values(
        ["n_flags", "distance_sq", "sample_id"], ascending=[False, False, True], na_position="last", kind="stable")
    note = f"{len(chosen)} respondent(s): {FILTERS.get(choice, FILTERS['all'])}."
    if len(chosen) > GRID_ROWS:
        note += f" The first {GRID_ROWS} are listed; the CSV download gives every respondent."
        chosen = chosen.iloc[:GRID_ROWS]
    rows = chosen[GRID_FIELDS].astype(object).where(chosen[GRID_FIELDS].notna(), None).to_dict("records")
    return rows, note


def screening_view(dataset_id: int, declared: list | None, choice: str | None):
    """(status, cut-offs, figure, grid rows, note) of the tab for the dataset and controls."""
    from webapp.services import screening

    try:
        screened = screening.screen_dataset(int(dataset_id), "declared" if declared else "auto")
    except InputError as exc:
        return (html.P(messages.as_sentence(str(exc)), className="ld-alert"), None,
                figures.empty_figure("No screening: see the message above."), [], "")
    summary = screened.summary()
    table = screened.table
    rules = {c["name"]: c["value"] for c in summary["cutoffs"]}
    figure = screening_figure(table, rules["long string"], rules["low IRV"], summary["n_items"])
    rows, note = grid_rows(table, choice or "all")
    notes = " ".join(summary["notes"])
    return _status(summary), _cutoff_list(summary), figure, rows, f"{note} {notes}".strip()


def proposal_link(dataset_id: int, rows: list | None, selected: list | None, choice: str | None,
                  search: str | None, can_act: bool) -> tuple[str, str, dict | None]:
    """(href, text, style) of the link to the proposal form: the rows ticked, else the flagged rows shown."""
    from webapp.services.screening import REASON_CATEGORY

    ticked = [r["sample_id"] for r in selected or [] if r and r.get("sample_id")]
    shown = [r["sample_id"] for r in rows or [] if r and r.get("n_flags")] if choice in ("flagged", "two") else []
    samples = ticked or shown
    if not samples or not can_act:
        return "", "", HIDDEN
    # The comparison uses the page's model settings; its own what-if exclusions are not carried over.
    state = url_state.from_query(search or "").with_changes(exclude=())
    href = url_state.propose_url(dataset_id, samples, state=state)
    href += "&" + urlencode({"category": REASON_CATEGORY}, quote_via=quote)
    which = "ticked" if ticked else "shown"
    return href, f"Propose excluding the {len(samples)} respondent(s) {which} as careless response", None


# --------------------------------------------------------------- callbacks
@callback(
    Output(ids.SCREENING_STATUS, "children"),
    Output(ids.SCREENING_CUTOFFS, "children"),
    Output(ids.SCREENING_PLOT, "figure"),
    Output(ids.SCREENING_GRID, "rowData"),
    Output(ids.SCREENING_NOTE, "children"),
    Input(ids.SCREENING_DECLARED, "value"),
    Input(ids.SCREENING_FILTER, "value"),
    State(ids.DATASET_ID, "data"),
)
def _screen(declared, choice, dataset_id):
    return screening_view(dataset_id, declared, choice)


@callback(
    Output(ids.SCREENING_PROPOSE, "href"),
    Output(ids.SCREENING_PROPOSE, "children"),
    Output(ids.SCREENING_PROPOSE, "style"),
    Input(ids.SCREENING_GRID, "rowData"),
    Input(ids.SCREENING_GRID, "selectedRows"),
    State(ids.SCREENING_FILTER, "value"),
    State(ids.DATASET_LOCATION, "search"),
    State(ids.DATASET_ID, "data"),
)
def _propose(rows, selected, choice, search, dataset_id):
    can_act = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return proposal_link(int(dataset_id), rows, selected, choice, search, can_act)
