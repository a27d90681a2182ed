"""The dataset page's side panels: one sample's explanation, the selection, downloads.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once; ``dataset.py`` imports
this module only inside functions, after the loader has run.

Sample ids, variable names and sentences are user text: they are only ever
children of html components (shown as text), never HTML or markdown.
"""

from __future__ import annotations

import numpy as np
from dash import Input, Output, State, callback, dcc, html, no_update

from webapp.web.ui import fields, figures, ids, plot_table
from webapp.web.ui.graph_config import SMALL_GRAPH_CONFIG

TOP_VARIABLES = 8
SELECTION_SHOWN = 40
DOWNLOAD_CHOICES = {"scores": "Scores", "loadings": "Loadings", "samples": "Samples: T², SPE, flags"}


# ----------------------------------------------------------------- layout
def downloads() -> html.Div:
    choice = dcc.Dropdown(id=ids.DOWNLOAD_TABLE, value="samples", clearable=False, searchable=False,
                          options=[{"label": label, "value": key} for key, label in DOWNLOAD_CHOICES.items()],
                          className="ld-download-choice")
    return html.Div(
        [
            fields.field_label("Table to download", choice, hidden=True),
            choice,
            html.Button("CSV", id=ids.DOWNLOAD_CSV, n_clicks=0, className="ld-button ld-button-quiet"),
            html.Button("XLSX", id=ids.DOWNLOAD_XLSX, n_clicks=0, className="ld-button ld-button-quiet"),
            dcc.Download(id=ids.DOWNLOAD),
        ],
        className="ld-downloads",
        role="group",
        **{"aria-label": "Download a table"},
    )


def side_panels() -> list:
    return [
        html.Section(
            [html.H2("Why is this sample here?"),
             html.Div(html.P("Click a point, or a row of the outlier table, to see what drives it.",
                             className="ld-muted"), id=ids.EXPLAIN_PANEL)],
            className="ld-panel ld-explain",
        ),
        html.Section(
            [html.H2("Selection"),
             html.Div(html.P("Drag a box or lasso on the score plot or a diagnostics plot to select samples.",
                             className="ld-muted"), id=ids.SELECTION_PANEL, **{"aria-live": "polite"})],
            className="ld-panel ld-selection",
        ),
    ]


# ------------------------------------------------------------ plain parts
def _fmt(value) -> str:
    return "–" if value is None else f"{value:.3g}"


def explain_view(result: dict | None, sample: str | None):
    """Children of the explanation panel for one sample of the fit on screen."""
    if not sample:
        return html.P("Click a point, or a row of the outlier table, to see what drives it.", className="ld-muted")
    if not result or not result.get("ok"):
        return html.P("No model yet.", className="ld-muted")
    from webapp.services import modelling

    try:
        info = modelling.contributions(int(result["id"]), sample, confidence=result.get("confidence"))
    except modelling.SampleNotFound:
        return html.P(f"This dataset has no sample {sample!s}.", className="ld-alert")
    level = f"{100 * float(result.get('confidence') or 0.95):g}%"
    t2_out = info["t2"] is not None and info["t2_limit"] is not None and info["t2"] > info["t2_limit"]
    spe_out = info["spe"] is not None and info["spe_limit"] is not None and info["spe"] > info["spe_limit"]
    region = {(False, False): "inside", (True, False): "t2", (False, True): "spe", (True, True): "both"}[
        (t2_out, spe_out)]
    ranked = info["ranked"]
    names = [r["variable"] for r in ranked]
    signed_spe = [np.sign(r["residual"] or 0.0) * r["spe_contribution"] for r in ranked]
    t2_parts = [r["t2_contribution"] for r in ranked]
    rows = [
        html.Tr([html.Td(r["variable"]), html.Td(_fmt(v["value"]), className="ld-num"),
                 html.Td(_fmt(r["standardized_value"]), className="ld-num"),
                 html.Td(_fmt(r["residual"]), className="ld-num")])
        for r, v in zip(ranked[:TOP_VARIABLES], [_value_of(info, r["variable"]) for r in ranked[:TOP_VARIABLES]])
    ]
    return html.Div(
        [
            html.H3(sample, className="ld-sample-id"),
            html.Button("Add to the selection", id=ids.EXPLAIN_SELECT, n_clicks=0,
                        className="ld-button ld-button-quiet ld-button-small"),
            html.P("Left out of this fit; compared with the new-sample limit." if info["excluded"] else None,
                   className="ld-muted"),
            html.P(info["sentence"], className="ld-sentence"),
            html.P(
                f"T² {_fmt(info['t2'])} (limit {_fmt(info['t2_limit'])}) · SPE {_fmt(info['spe'])} "
                f"(limit {_fmt(info['spe_limit'])}) at {level}: {_lower_first(figures.REGION_TEXT[region])}.",
                className="ld-stats"),
            plot_table.plot_figure(dcc.Graph(
                id=ids.GRAPH_SPE_CONTRIB, config=SMALL_GRAPH_CONFIG,
                figure=_small(figures.contribution_figure(
                    names, signed_spe, title="SPE contributions", top=TOP_VARIABLES,
                    value_title="squared residual × its sign"))), class_name="ld-graph-small"),
            plot_table.plot_figure(dcc.Graph(
                id=ids.GRAPH_T2_CONTRIB, config=SMALL_GRAPH_CONFIG,
                figure=_small(figures.contribution_figure(
                    names, t2_parts, title="T² contributions", top=TOP_VARIABLES,
                    value_title="contribution to T²"))), class_name="ld-graph-small"),
            html.Div(html.Table(
                [html.Thead(html.Tr([html.Th("Variable"), html.Th("Value"), html.Th("SD from mean"),
                                     html.Th("Residual")])),
                 html.Tbody(rows)], className="ld-table ld-table-compact"), className="ld-scroll"),
            html.P("SD from mean: standardised value (after log10 where chosen). Residual: what the model "
                   "cannot reproduce, in scaled units.", className="ld-muted ld-small"),
        ]
    )


def _lower_first(text: str) -> str:
    return text[:1].lower() + text[1:]


def _value_of(info: dict, variable: str) -> dict:
    for v in info["variables"]:
        if v["variable"] == variable:
            return v
    return {"value": None}


def _small(fig):
    fig.update_layout(margin=dict(l=8, r=16, t=36, b=40), title_font_size=13, font_size=11)
    fig.update_xaxes(title_font_size=11)
    return fig


def selection_view(selection: dict | None):
    """Children of the selection panel."""
    chosen = (selection or {}).get("sample_ids") or []
    if not chosen:
        return html.P("Drag a box or lasso on the score plot or a diagnostics plot to select samples.",
                      className="ld-muted")
    shown = ", ".join(chosen[:SELECTION_SHOWN])
    more = f" and {len(chosen) - SELECTION_SHOWN} more" if len(chosen) > SELECTION_SHOWN else ""
    return html.Div(
        [
            html.P(f"{len(chosen)} sample{'s' if len(chosen) != 1 else ''} selected:", className="ld-strong"),
            html.P(shown + more, className="ld-selection-ids"),
            html.Div(
                [html.Button("Fit again without them", id=ids.SELECTION_LEAVE_OUT, n_clicks=0,
                             className="ld-button ld-button-quiet",
                             title="A trial fit: the data are unchanged; put them back at any time"),
                 html.Button("Clear", id=ids.SELECTION_CLEAR, n_clicks=0, className="ld-link-button")],
                className="ld-button-row",
            ),
        ]
    )


def leave_out(applied: dict | None, selection: dict | None) -> dict | None:
    """Applied settings with the selected samples added to the samples left out (None: nothing to do)."""
    chosen = (selection or {}).get("sample_ids") or []
    if not chosen:
        return None
    current = list((applied or {}).get("exclude") or [])
    merged = current + [s for s in chosen if s not in set(current)]
    return {**(applied or {}), "exclude": merged}


def with_sample(selection: dict | None, sample: str | None, result: dict | None) -> dict | None:
    """The selection store with ``sample`` added (the explained sample, chosen without a
    pointer); None when there is no sample or it is already selected. No plot shows the
    new selection yet, so every plot draws it."""
    chosen = list((selection or {}).get("sample_ids") or [])
    if not sample or sample in chosen:
        return None
    return {**(selection or {}), "dataset_id": (selection or {}).get("dataset_id") or (result or {}).get("dataset_id"),
            "fingerprint": (result or {}).get("fingerprint"), "sample_ids": chosen + [sample], "drawn_on": None}


def cleared_selection(selection: dict | None) -> dict:
    """The selection store after "Clear": no samples, and no plot that already shows
    that (so every plot is drawn again without the old selection)."""
    return {**(selection or {}), "sample_ids": [], "drawn_on": None}


def download_payload(result: dict | None, which: str, fmt: str) -> tuple[bytes, str] | None:
    """(file bytes, file name) of one table of the fit on screen, or None without a model."""
    if not result or not result.get("ok"):
        return None
    from webapp.services import exports, modelling

    model_id = int(result["id"])
    if which == "loadings":
        frame = modelling.variables_table(model_id)
    else:
        frame = modelling.samples_table(model_id, confidence=result.get("confidence"))
        if which == "scores":
            keep = [c for c in frame.columns if not c.startswith(("T2", "SPE")) and c != "flags"]
            frame = frame[keep]
    frame.attrs = {}
    stem = f"dataset{result['dataset_id']}_{which}_{result['fingerprint'][:10]}"
    if fmt == "xlsx":
        return exports.to_xlsx_bytes(frame, sheet_name=which), f"{stem}.xlsx"
    return exports.to_csv_bytes(frame), f"{stem}.csv"


# --------------------------------------------------------------- callbacks
@callback(
    Output(ids.EXPLAIN_PANEL, "children"),
    Input(ids.VIEW_SAMPLE, "data"),
    Input(ids.FIT_RESULT, "data"),
)
def _explain(sample, result):
    return explain_view(result, sample)


@callback(
    Output(ids.SELECTION_PANEL, "children"),
    Input(ids.SELECTION_STORE, "data"),
)
def _selection(selection):
    return selection_view(selection)


@callback(
    Output(ids.SELECTION_STORE, "data", allow_duplicate=True),
    Input(ids.EXPLAIN_SELECT, "n_clicks"),
    State(ids.VIEW_SAMPLE, "data"),
    State(ids.SELECTION_STORE, "data"),
    State(ids.FIT_RESULT, "data"),
    prevent_initial_call=True,
)
def _add_explained(clicks, sample, selection, result):
    if not clicks:
        return no_update
    new = with_sample(selection, sample, result)
    return new if new is not None else no_update


@callback(
    Output(ids.SELECTION_STORE, "data", allow_duplicate=True),
    Input(ids.SELECTION_CLEAR, "n_clicks"),
    State(ids.SELECTION_STORE, "data"),
    prevent_initial_call=True,
)
def _clear(clicks, selection):
    if not clicks:
        return no_update
    return cleared_selection(selection)


@callback(
    Output(ids.SETTINGS_APPLIED, "data", allow_duplicate=True),
    Input(ids.SELECTION_LEAVE_OUT, "n_clicks"),
    State(ids.SETTINGS_APPLIED, "data"),
    State(ids.SELECTION_STORE, "data"),
    prevent_initial_call=True,
)
def _leave_out(clicks, applied, selection):
    if not clicks:
        return no_update
    new = leave_out(applied, selection)
    return new if new is not None else no_update


@callback(
    Output(ids.DOWNLOAD, "data"),
    Input(ids.DOWNLOAD_CSV, "n_clicks"),
    Input(ids.DOWNLOAD_XLSX, "n_clicks"),
    State(ids.DOWNLOAD_TABLE, "value"),
    State(ids.FIT_RESULT, "data"),
    prevent_initial_call=True,
)
def _download(_csv, _xlsx, which, result):
    from dash import ctx

    fmt = "xlsx" if ctx.triggered_id == ids.DOWNLOAD_XLSX else "csv"
    payload = download_payload(result, which or "samples", fmt)
    if payload is None:
        return no_update
    content, filename = payload
    return dcc.send_bytes(content, filename)
