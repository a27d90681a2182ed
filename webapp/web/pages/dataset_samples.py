"""The dataset page's side panels: one sample's explanation, the selection, downloads;
and on the outliers tab the outlier map with the classical and robust fits side by side.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once; ``dataset.py`` imports
this module only inside functions, after the loader has run.

Sample ids, variable names and sentences are user text: they are only ever
children of html components (shown as text), never HTML or markdown.
"""

from __future__ import annotations

import html as html_text

import numpy as np
from dash import Input, Output, State, callback, dcc, html, no_update

from webapp.web.ui import fields, figures, ids, plot_table
from webapp.web.ui.graph_config import GRAPH_CONFIG, SMALL_GRAPH_CONFIG

TOP_VARIABLES = 8
SELECTION_SHOWN = 40
LISTED_SHOWN = 60  # sample ids written out per side-by-side list
METHOD_CAUTION = (
    "A sample flagged by one fit and not the other is a reason to look at its record, not a verdict. "
    "Statistics support, and never replace, QA judgement and local procedures; regulated use needs the "
    "site's own validation."
)
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


def method_panels() -> list:
    """The outliers tab's outlier map and the lists of samples only one method flags."""
    return [
        html.Section(
            [html.H2("Outlier map"),
             plot_table.plot_figure(dcc.Graph(id=ids.GRAPH_OUTLIER_MAP, config=GRAPH_CONFIG,
                                              figure=figures.empty_figure("Fitting…"))),
             html.Ul([html.Li(text) for text in figures.MAP_REGION_TEXT.values()], className="ld-regions")],
            className="ld-panel ld-outlier-map",
        ),
        html.Section(
            [html.H2("Classical and robust fits side by side"),
             html.Div(html.P("Comparing the two fits…", className="ld-muted"), id=ids.METHOD_SIDE_BY_SIDE,
                      **{"aria-live": "polite"})],
            className="ld-panel ld-side-by-side",
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
    robust = info.get("method") == "robust"
    if robust:
        map_region = list(figures.MAP_REGION_TEXT)[int(t2_out) + 2 * int(spe_out)]
        stats_line = (f"Score distance {_fmt(info['score_distance'])} (cut-off {_fmt(info['sd_cutoff'])}) · "
                      f"orthogonal distance {_fmt(info['orthogonal_distance'])} (cut-off {_fmt(info['od_cutoff'])}) "
                      f"at {level}: {_lower_first(figures.MAP_REGION_TEXT[map_region])}.")
        titles = ("OD² contributions", "squared residual to the robust plane × its sign",
                  "SD² contributions", "contribution to SD²")
    else:
        stats_line = (f"T² {_fmt(info['t2'])} (limit {_fmt(info['t2_limit'])}) · SPE {_fmt(info['spe'])} "
                      f"(limit {_fmt(info['spe_limit'])}) at {level}: {_lower_first(figures.REGION_TEXT[region])}.")
        titles = ("SPE contributions", "squared residual × its sign", "T² contributions", "contribution to T²")
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
            html.P(stats_line, className="ld-stats"),
            plot_table.plot_figure(dcc.Graph(
                id=ids.GRAPH_SPE_CONTRIB, config=SMALL_GRAPH_CONFIG,
                figure=_small(figures.contribution_figure(
                    names, signed_spe, title=titles[0], top=TOP_VARIABLES,
                    value_title=titles[1]))), class_name="ld-graph-small"),
            plot_table.plot_figure(dcc.Graph(
                id=ids.GRAPH_T2_CONTRIB, config=SMALL_GRAPH_CONFIG,
                figure=_small(figures.contribution_figure(
                    names, t2_parts, title=titles[2], top=TOP_VARIABLES,
                    value_title=titles[3]))), class_name="ld-graph-small"),
            html.Div(html.Table(
                [html.Thead(html.Tr([html.Th("Variable"), html.Th("Value"),
                                     html.Th("SD from the robust centre" if robust else "SD from mean"),
                                     html.Th("Residual")])),
                 html.Tbody(rows)], className="ld-table ld-table-compact"), className="ld-scroll"),
            html.P("SD from the robust centre: in robust SDs (MAD-based), after log10 where chosen. Residual: "
                   "what the robust model cannot reproduce, in scaled units." if robust else
                   "SD from mean: standardised value (after log10 where chosen). Residual: what the model "
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


def outlier_map_view(result: dict | None, sample: str | None = None, selected: list[str] | None = None):
    """The outlier map (``figures.outlier_map_figure``) of the fit on screen, either method."""
    if not result or not result.get("ok"):
        return figures.empty_figure("No model yet.")
    from webapp.services import modelling

    model, info = modelling.get_model(int(result["dataset_id"]), result["settings"])
    confidence = float(info["confidence"])
    picked = [list(model.sample_ids_).index(sample)] if sample in set(model.sample_ids_) else []
    fig = figures.outlier_map_figure(
        np.sqrt(model.t2_), np.sqrt(model.spe_), float(np.sqrt(model.t2_limit(confidence))),
        float(np.sqrt(model.spe_limit(confidence))), sample_ids=model.sample_ids_, confidence=confidence,
        method=info["method"], highlight=picked, selected=selected)
    fig.update_layout(meta={"model": info["fingerprint"]})
    return fig


def _listed(title: str, samples: list[str], button_id: str) -> html.Div:
    shown = ", ".join(samples[:LISTED_SHOWN])
    more = f" and {len(samples) - LISTED_SHOWN} more" if len(samples) > LISTED_SHOWN else ""
    return html.Div(
        [html.H3(f"{title} ({len(samples)})", className="ld-subhead"),
         html.P(shown + more if samples else "None.", className="ld-selection-ids"),
         html.Button("Select them", id=button_id, n_clicks=0, className="ld-button ld-button-quiet ld-button-small",
                     disabled=not samples,
                     title="Put these samples in the selection, to propose an exclusion citing both fits")],
        className="ld-method-list",
    )


def side_by_side_view(compared: dict) -> html.Div:
    """Children of the side-by-side panel for ``method_comparison.side_by_side``'s answer."""
    level = f"{100 * float(compared['confidence']):g}%"
    classical, robust = compared["classical"], compared["robust"]
    if robust is None:
        return html.Div([
            html.P(f"The robust fit is not possible here: {compared['robust_error']}", className="ld-alert"),
            html.P(f"The classical fit flags {classical['n_flagged']} samples at {level}."),
        ])
    counts = compared["counts"]
    return html.Div(
        [
            html.P(f"With {compared['n_components']} component(s), limits at {level}: the classical fit (T², SPE) "
                   f"flags {classical['n_flagged']} samples; the robust fit (ROBPCA, h = {robust['h']}, score "
                   f"distance cut-off {robust['sd_cutoff']:.3g}, orthogonal distance cut-off "
                   f"{robust['od_cutoff']:.3g}) flags {robust['n_flagged']}."),
            _listed("Flagged by the robust fit only", compared["robust_only"], ids.METHOD_SELECT_ROBUST_ONLY),
            _listed("Flagged by the classical fit only", compared["classical_only"], ids.METHOD_SELECT_CLASSICAL_ONLY),
            html.P(f"Flagged by both: {counts['both']}; by neither: {counts['neither']}. A group the robust fit "
                   "flags alone may have pulled the classical fit towards itself (masking; Hubert, Rousseeuw "
                   "& Vanden Branden 2005).", className="ld-muted"),
            html.P(f"Not scored by the robust fit (a missing value; ROBPCA needs complete samples): "
                   f"{len(compared['robust_unscored'])}: {', '.join(compared['robust_unscored'][:LISTED_SHOWN])}"
                   f"{' …' if len(compared['robust_unscored']) > LISTED_SHOWN else ''}.",
                   className="ld-muted") if compared["robust_unscored"] else None,
            html.P(METHOD_CAUTION, className="ld-caution"),
        ]
    )


def side_by_side_panel(result: dict | None) -> html.Div | html.P:
    """The side-by-side panel for the fit on screen (both methods fitted, or read from the cache)."""
    if not result or not result.get("ok"):
        return html.P("No model yet.", className="ld-muted")
    from analysis.errors import InputError
    from webapp.services import method_comparison

    try:
        compared = method_comparison.side_by_side(int(result["dataset_id"]), result["settings"])
    except InputError as exc:
        return html.P(str(exc), className="ld-alert")
    return side_by_side_view(compared)


def select_listed(result: dict | None, selection: dict | None, which: str) -> dict | None:
    """The selection store holding the samples only one method flags (``which``:
    "robust_only" or "classical_only"); None when there are none."""
    if not result or not result.get("ok"):
        return None
    from webapp.services import method_comparison

    listed = method_comparison.side_by_side(int(result["dataset_id"]), result["settings"]).get(which) or []
    if not listed:
        return None
    return {**(selection or {}), "dataset_id": int(result["dataset_id"]), "fingerprint": result.get("fingerprint"),
            "sample_ids": list(listed), "drawn_on": None}


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


@callback(
    Output(ids.GRAPH_OUTLIER_MAP, "figure"),
    Input(ids.FIT_RESULT, "data"),
    Input(ids.SELECTION_STORE, "data"),
    State(ids.VIEW_SAMPLE, "data"),
)
def _outlier_map(result, selection, sample):
    return outlier_map_view(result, sample, list((selection or {}).get("sample_ids") or []))


@callback(
    Output(ids.VIEW_SAMPLE, "data", allow_duplicate=True),
    Input(ids.GRAPH_OUTLIER_MAP, "clickData"),
    prevent_initial_call=True,
)
def _map_clicked(event):
    points = (event or {}).get("points") or []
    texts = [p.get("text") for p in points if p.get("text") is not None]
    return html_text.unescape(str(texts[0])) if texts else no_update


@callback(
    Output(ids.METHOD_SIDE_BY_SIDE, "children"),
    Input(ids.FIT_RESULT, "data"),
    background=True,
)
def _side_by_side(result):
    from webapp import jobs

    with jobs.app_context():
        return side_by_side_panel(result)


@callback(
    Output(ids.SELECTION_STORE, "data", allow_duplicate=True),
    Input(ids.METHOD_SELECT_ROBUST_ONLY, "n_clicks"),
    Input(ids.METHOD_SELECT_CLASSICAL_ONLY, "n_clicks"),
    State(ids.FIT_RESULT, "data"),
    State(ids.SELECTION_STORE, "data"),
    prevent_initial_call=True,
)
def _select_listed(_robust, _classical, result, selection):
    from dash import ctx

    if not ctx.triggered or not (ctx.triggered[0].get("value") or 0):
        return no_update
    which = "robust_only" if ctx.triggered_id == ids.METHOD_SELECT_ROBUST_ONLY else "classical_only"
    new = select_listed(result, selection, which)
    return new if new is not None else no_update
