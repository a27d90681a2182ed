"""The dataset page's tabs: variance, scores, loadings/biplot, diagnostics, outliers.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once; ``dataset.py`` imports
this module only inside functions, after the loader has run.

Each callback hands its inputs to a plain function (``*_view``) that gets the
model from ``webapp.services.modelling`` (a cache hit once the fit has run:
changing colours, axes or labels never refits) and draws with
``webapp.web.ui.figures``.
"""

from __future__ import annotations

import html as html_text

import dash_ag_grid as dag
import numpy as np
import pandas as pd
from dash import ALL, Input, Output, Patch, State, callback, clientside_callback, ctx, dcc, html, no_update
from scipy import stats

from analysis import diagnostics
from analysis.rank import with_model
from webapp.web.ui import figures, ids, plot_table
from webapp.web.ui.graph_config import GRAPH_CONFIG
from webapp.web.ui.grid_options import ONE_TAB_STOP

LIMIT_LEVELS = (0.95, 0.99)
EXPLORE_CACHE = "explore"  # HOME/cache/explore: metadata columns in model order
OUTLIER_ROWS = 500  # the most extreme flagged samples listed with their top variables
CAUTION = (
    "Flags support, and never replace, QA judgement and site procedures. "
    "An extreme sample is not necessarily a wrong one: check the record before acting on a flag."
)


# ----------------------------------------------------------------- layout
def _graph(graph_id: str) -> html.Div:
    # A named figure with its numbers one click away (plot_table.plot_figure).
    return plot_table.plot_figure(
        # No loading overlay: it hides and re-shows the plot, which costs a WebGL redraw.
        dcc.Graph(id=graph_id, config=GRAPH_CONFIG, figure=figures.empty_figure("Fitting…")),
        html.Div(
            [html.Span("Save picture:", className="ld-muted"),
             html.Button("PNG", id=ids.image_button(graph_id, "png"), n_clicks=0, className="ld-link-button"),
             html.Button("SVG", id=ids.image_button(graph_id, "svg"), n_clicks=0, className="ld-link-button")],
            className="ld-picture-links",
        ),
    )


def _regions_text() -> html.Ul:
    return html.Ul([html.Li(text) for text in figures.REGION_TEXT.values()], className="ld-regions")


def tab_content(tab: str) -> list:
    """Components of one tab (only the open tab is in the page: at most three WebGL plots)."""
    if tab == "variance":
        return [
            dcc.Store(id=ids.RANK_STORE),
            _graph(ids.GRAPH_VARIANCE),
            html.Div(id=ids.RANK_TABLE, className="ld-rank"),
            _graph(ids.GRAPH_VARIABLE_EXPLAINED),
        ]
    if tab == "loadings":
        return [_graph(ids.GRAPH_LOADINGS)]
    if tab == "diagnostics":
        return [
            html.P(CAUTION, className="ld-caution"),
            _graph(ids.GRAPH_T2_SPE),
            html.Div([html.Strong("Reading the four regions"), _regions_text()], className="ld-region-note"),
            _graph(ids.GRAPH_T2_CHART),
            _graph(ids.GRAPH_SPE_CHART),
        ]
    if tab == "screening":
        from webapp.web.pages import dataset_screening

        return dataset_screening.tab_content()
    if tab == "outliers":
        from webapp.web.pages import dataset_samples

        return [
            html.P(CAUTION, className="ld-caution"),
            *dataset_samples.method_panels(),  # the outlier map, classical and robust side by side
            html.P(id=ids.OUTLIER_NOTE, className="ld-muted"),
            dag.AgGrid(
                id=ids.OUTLIER_GRID,
                rowData=[],
                columnDefs=[],
                defaultColDef={"sortable": True, "filter": True, "resizable": True, "minWidth": 100, "flex": 1},
                dashGridOptions={"rowSelection": {"mode": "singleRow", "checkboxes": False,
                                                  "enableClickSelection": True},
                                 "animateRows": False, **ONE_TAB_STOP},
                getRowId="params.data.sample_id",
                className="ag-theme-quartz ld-grid",
                style={"height": "520px"},
            ),
        ]
    return [dcc.Store(id=ids.SCORE_DRAWN), _graph(ids.GRAPH_SCORES)]


# ------------------------------------------------------------ plain parts
def _model(result: dict):
    from webapp.services import modelling

    return modelling.get_model(int(result["dataset_id"]), result["settings"])


def _training_frame(dataset_id: int, model) -> pd.DataFrame:
    """Metadata of the model's training samples, in the model's order."""
    from webapp.services import ingest

    table = ingest.load_table(int(dataset_id))
    meta = table.metadata
    if list(meta.index) != list(model.sample_ids_):
        meta = meta.reindex(model.sample_ids_)
    return meta


def _column(meta: pd.DataFrame, name: str | None):
    if not name or name not in meta.columns:
        return None
    return meta[name].to_numpy(dtype=object)


def training_column(result: dict, model, name: str | None):
    """One metadata column in the model's sample order, kept on disk per model and
    column (a recolour then reads a few kilobytes instead of the whole table)."""
    if not name:
        return None
    import diskcache

    from webapp.services.context import cache_folder

    cache = diskcache.Cache(str(cache_folder() / EXPLORE_CACHE))
    key = f"column:{result['fingerprint']}:{name}"
    stored = cache.get(key)
    if stored is not None:
        return stored[0]
    values = _column(_training_frame(result["dataset_id"], model), name)
    cache.set(key, (values,))
    return values


def _picked(model, sample_id: str | None) -> list[int]:
    if not sample_id:
        return []
    try:
        return [list(model.sample_ids_).index(sample_id)]
    except ValueError:
        return []


def ellipse_limits(n_samples: int, robust: bool = False, components: int = 2) -> dict[float, float]:
    """Training T2 limits with two components (one for a one-component plot), for the
    ellipses of a score plot (Tracy, Young & Mason 1992): the ellipse holds the samples
    whose T2 on the plotted components is within the limit. For a robust fit the
    squared score-distance cut-off, chi2 quantile (Hubert, Rousseeuw & Vanden Branden 2005)."""
    if robust:
        return {c: float(stats.chi2.ppf(c, components)) for c in LIMIT_LEVELS}
    return {c: diagnostics.t2_limit(n_samples, components, c) for c in LIMIT_LEVELS}


def _is_robust(result: dict) -> bool:
    return result.get("method") == "robust"


def score_update(result: dict | None, *, pcx: int, pcy: int, colour: str | None, shape: str | None,
                 labels: bool, sample: str | None = None, drawn: dict | None = None,
                 selected: list[str] | None = None):
    """The score plot, or only what changed: (figure or dash.Patch, drawn state).

    ``drawn`` describes the plot on screen. When it shows many samples of the
    same model without shapes, a new colouring, axis pair, label switch or
    selection is sent as a Patch (typed arrays): a recolour replaces the point
    traces (one per group) and the legend, an axis change sends new coordinates;
    the T2 ellipses and picked points move only when the axes change. Every patch
    sets the selected points (``selected`` sample ids) of the point traces, so a
    selection change alone is a small patch. Anything else draws the figure again.
    """
    if not result or not result.get("ok"):
        return score_view(result, pcx=pcx, pcy=pcy, colour=colour, shape=shape, labels=labels)[0], None
    model, info = _model(result)
    n_comp = model.scores_.shape[1]
    x, y = int(pcx or 1) - 1, int(pcy or 2) - 1
    state = {"model": info["fingerprint"], "pcx": pcx, "pcy": pcy, "colour": colour, "shape": shape,
             "labels": bool(labels), "large": model.n_samples_ > figures.WEBGL_THRESHOLD,
             "n_ellipses": len(LIMIT_LEVELS)}
    patchable = (drawn and drawn.get("large") and drawn.get("model") == state["model"] and not shape
                 and not drawn.get("shape") and "n_points" in drawn and n_comp >= 2 and max(x, y) < n_comp)
    if not patchable:
        fig, _ = score_view(result, pcx=pcx, pcy=pcy, colour=colour, shape=shape, labels=labels, sample=sample,
                            selected=selected)
        if not (state["large"] and fig.data):
            return fig, None
        n_points = sum(1 for t in fig.data if t.type == "scattergl")
        state["n_points"] = n_points
        state["n_legend"] = len(fig.data) - n_points - len(LIMIT_LEVELS) - 1
        return fig, state
    patch = Patch()
    state["n_points"], state["n_legend"] = drawn["n_points"], drawn.get("n_legend", 0)
    recolour = colour != drawn.get("colour")
    new_axes = (pcx, pcy) != (drawn.get("pcx"), drawn.get("pcy"))
    chosen = figures.selection_mask(model.sample_ids_, selected, model.n_samples_)
    encoding = figures.score_colours(training_column(result, model, colour), colour)
    if recolour or new_axes:
        axes = figures.score_axes(model.scores_, model.explained_variance_ratio_, x, y, model.eigenvalues_,
                                  ellipse_limits(model.n_samples_, _is_robust(result)), _picked(model, sample))
    if recolour:
        # new point traces (one per group) and legend; the ellipses and the picked points stay
        traces = figures.score_point_traces(axes, figures.id_text(model.sample_ids_, model.n_samples_), encoding,
                                            labels=bool(labels), chosen=chosen)
        first_legend = drawn["n_points"] + drawn["n_ellipses"] + 1
        for i in reversed(range(first_legend, first_legend + drawn.get("n_legend", 0))):
            del patch["data"][i]
        for _ in range(drawn["n_points"]):
            del patch["data"][0]
        for i, trace in enumerate(traces):
            patch["data"].insert(i, figures.patch_json(trace))
        for entry in encoding["legend"]:
            patch["data"].append(entry.to_plotly_json())
        patch["layout"]["legend"]["title"]["text"] = encoding["title"]
        state["n_points"], state["n_legend"] = len(traces), len(encoding["legend"])
    else:
        for i, part in enumerate(encoding["parts"]):
            rows = slice(None) if part["rows"] is None else part["rows"]
            if new_axes:
                patch["data"][i]["x"] = figures.typed_array(axes["x"][rows], "f4")
                patch["data"][i]["y"] = figures.typed_array(axes["y"][rows], "f4")
                patch["data"][i]["hovertemplate"] = figures.point_hover(axes, part)
            # plotly.js writes a drag's selection into the figure it was given: always say which is meant
            points = figures.selected_points(chosen, rows)
            patch["data"][i]["selectedpoints"] = None if points is None else figures.typed_array(points, "i4")
    # a drag also marks the picked points; they are never drawn as selected
    patch["data"][state["n_points"] + drawn["n_ellipses"]]["selectedpoints"] = None
    if new_axes:
        for i, (ex, ey) in enumerate(axes["ellipses"]):
            patch["data"][state["n_points"] + i]["x"] = figures.typed_array(ex)
            patch["data"][state["n_points"] + i]["y"] = figures.typed_array(ey)
        picked = state["n_points"] + drawn["n_ellipses"]
        patch["data"][picked]["x"] = list(axes["picked"][0])
        patch["data"][picked]["y"] = list(axes["picked"][1])
        for axis, title in (("xaxis", axes["xtitle"]), ("yaxis", axes["ytitle"])):
            patch["layout"][axis]["title"]["text"] = title
            patch["layout"][axis]["autorange"] = True
    if bool(labels) != drawn.get("labels") and not recolour:
        for i in range(state["n_points"]):
            patch["data"][i]["mode"] = "markers+text" if labels else "markers"
    return patch, state


def score_view(result: dict | None, *, pcx: int, pcy: int, colour: str | None, shape: str | None,
               labels: bool, sample: str | None = None, selected: list[str] | None = None):
    """The whole score plot for a fit result and view settings; (figure, cache_hit)."""
    if not result or not result.get("ok"):
        return figures.empty_figure("No model yet: choose settings and press Fit model."), None
    model, info = _model(result)
    n_comp = model.scores_.shape[1]
    x, y = int(pcx or 1) - 1, int(pcy or 2) - 1
    if n_comp < 2:
        fig = figures.single_component_figure(
            model.scores_, model.explained_variance_ratio_, model.eigenvalues_[0],
            ellipse_limits(model.n_samples_, _is_robust(result), components=1),
            sample_ids=model.sample_ids_, colour_values=training_column(result, model, colour), colour_name=colour,
            highlight=_picked(model, sample), selected=selected)
        fig.update_layout(meta={"model": info["fingerprint"]})
        return fig, info["cache_hit"]
    if max(x, y) >= n_comp:
        return figures.empty_figure(f"The model has {n_comp} components: choose axes up to PC{n_comp}."), \
            info["cache_hit"]
    # hover shows metadata only for moderate sizes (figures.HOVER_METADATA_LIMIT)
    meta = _training_frame(result["dataset_id"], model) if model.n_samples_ <= figures.HOVER_METADATA_LIMIT else None
    fig = figures.score_figure(
        model.scores_, model.explained_variance_ratio_, x=x, y=y, sample_ids=model.sample_ids_,
        colour_values=training_column(result, model, colour), colour_name=colour,
        symbol_values=training_column(result, model, shape),
        symbol_name=shape, labels=bool(labels), eigenvalues=model.eigenvalues_,
        t2_limits=ellipse_limits(model.n_samples_, _is_robust(result)), metadata=meta, highlight=_picked(model, sample),
        selected=selected,
    )
    fig.update_layout(meta={"model": info["fingerprint"]})  # which model a drawn plot shows
    return fig, info["cache_hit"]


def loading_view(result: dict | None, *, pcx: int, pcy: int, mode: str, colour: str | None = None):
    """Loading plot, biplot or bars of the x-axis component; a figure."""
    if not result or not result.get("ok"):
        return figures.empty_figure("No model yet.")
    model, _ = _model(result)
    n_comp = model.scores_.shape[1]
    x, y = int(pcx or 1) - 1, int(pcy or 2) - 1
    if mode == "bars" and x < n_comp:
        return figures.loading_bars_figure(model.loadings_, model.variable_names_, x, model.explained_variance_ratio_)
    if n_comp < 2 or max(x, y) >= n_comp:
        return figures.empty_figure(f"The model has {n_comp} component(s): choose axes up to PC{n_comp}.")
    if mode == "biplot":
        return figures.biplot_figure(model.scores_, model.loadings_, model.eigenvalues_,
                                     model.explained_variance_ratio_, model.variable_names_, x=x, y=y,
                                     sample_ids=model.sample_ids_,
                                     colour_values=training_column(result, model, colour),
                                     colour_name=colour)
    return figures.loading_figure(model.loadings_, model.variable_names_, model.explained_variance_ratio_, x=x, y=y)


def limits_of(model) -> tuple[dict[float, float], dict[float, float]]:
    """T2 (training, beta) and SPE (Jackson & Mudholkar) limits at 95% and 99%."""
    return ({c: model.t2_limit(c) for c in LIMIT_LEVELS}, {c: model.spe_limit(c) for c in LIMIT_LEVELS})


def diagnostics_view(result: dict | None, *, order: str | None, sample: str | None = None,
                     selected: list[str] | None = None):
    """(T2-vs-SPE figure, T2 chart, SPE chart) for a fit result, the ``selected`` sample ids
    drawn as selected on each."""
    if not result or not result.get("ok"):
        empty = figures.empty_figure("No model yet.")
        return empty, empty, empty
    model, _ = _model(result)
    t2_limits, spe_limits = limits_of(model)
    confidence = float(result.get("confidence") or 0.95)
    if confidence not in t2_limits:
        t2_limits[confidence] = model.t2_limit(confidence)
        spe_limits[confidence] = model.spe_limit(confidence)
    picked = _picked(model, sample)
    ids_ = model.sample_ids_
    order_values = training_column(result, model, order)
    both = figures.t2_spe_figure(model.t2_, model.spe_, t2_limits, spe_limits, sample_ids=ids_,
                                 confidence=confidence, highlight=picked, selected=selected)
    chart = dict(confidence=confidence, order=order_values, order_name=order, sample_ids=ids_, highlight=picked,
                 selected=selected)
    robust = result.get("method") == "robust"  # T2 = SD^2, SPE = OD^2 (analysis.robust)
    t2_chart = figures.control_chart_figure(model.t2_, t2_limits, name="SD² (robust)" if robust else "Hotelling's T²",
                                            **chart)
    spe_chart = figures.control_chart_figure(model.spe_, spe_limits, name="OD² (robust)" if robust else "SPE", **chart)
    return both, t2_chart, spe_chart


def variance_view(result: dict | None, rank: dict | None = None):
    """(scree figure, component-choice table, per-variable explained figure).

    ``rank`` is the component-choice table computed on request for a fit with a
    given number of components (a "Recommended" fit carries its own)."""
    if not result or not result.get("ok"):
        empty = figures.empty_figure("No model yet.")
        return empty, None, empty
    model, _ = _model(result)
    rank = result.get("rank") or rank
    n_comp = model.scores_.shape[1]
    if rank and rank.get("table"):
        rank = with_model(rank, model)  # the model on screen: one number for one thing
        rows = rank["table"]
        ratio = [r["explained"] for r in rows]
        cv = [r["cv_explained"] for r in rows]
        cv = None if all(v is None for v in cv) else [np.nan if v is None else v for v in cv]
        scree = figures.variance_figure(ratio, cv_cumulative=cv, recommended=rank.get("recommended"), chosen=n_comp)
        table = rank_table(rank)
    else:
        scree = figures.variance_figure(model.explained_variance_ratio_, chosen=n_comp)
        table = html.Div([
            html.P("The component-choice table (cross-validation, parallel analysis, broken stick) takes a "
                   "while on large data, so it is computed when you ask.", className="ld-muted"),
            html.Button("Compute the component-choice table", id=ids.RANK_BUTTON, n_clicks=0,
                        className="ld-button ld-button-quiet"),
            html.Span(id=ids.RANK_STATUS, className="ld-muted", role="status"),
        ])
    per_variable = figures.variable_explained_figure(model.variable_names_, model.variable_explained_)
    return scree, table, per_variable


def _pct(value) -> str:
    return "–" if value is None else f"{100 * value:.1f}%"


def _num(value) -> str:
    return "–" if value is None else f"{value:.3g}"


def rank_table(rank: dict) -> html.Div:
    """The component-choice table (``analysis.rank``) as a plain HTML table of text; a count
    cross-validation could not estimate says so (the reason is in the notes below)."""
    rec = rank.get("recommended")
    validated = any(row["cv_explained"] is not None for row in rank["table"])
    head = html.Tr([html.Th(h) for h in ("Components", "Eigenvalue", "Explained", "Cumulative",
                                         "Cumulative, cross-validated", "Parallel analysis threshold",
                                         "Broken stick share")])
    body = []
    for row in rank["table"]:
        cells = [row["components"], _num(row["eigenvalue"]), _pct(row["explained"]), _pct(row["cumulative"]),
                 _pct(row["cv_explained"]) if row["cv_explained"] is not None or not validated else "not estimable",
                 _num(row["parallel_threshold"]), _pct(row["broken_stick"])]
        body.append(html.Tr([html.Td(str(c), className="ld-num") for c in cells],
                            className="ld-row-recommended" if row["components"] == rec else None))
    notes = [html.P(n, className="ld-muted") for n in rank.get("notes") or []]
    return html.Div([
        html.P(f"Recommended: {rec}. {rank.get('rule', '')}"),
        html.Div(html.Table([html.Thead(head), html.Tbody(body)], className="ld-table"), className="ld-scroll"),
        *notes,
    ])


REGION_WORDS = {"t2": "high T² only", "spe": "high SPE only", "both": "high T² and SPE"}


def outlier_rows(result: dict | None) -> tuple[list[dict], list[dict], str]:
    """Rows, column definitions and a note for the outlier table."""
    if not result or not result.get("ok"):
        return [], [], "No model yet."
    model, _ = _model(result)
    confidence = float(result.get("confidence") or 0.95)
    t2_lim, spe_lim = model.t2_limit(confidence), model.spe_limit(confidence)
    regions = figures.classify_regions(model.t2_, model.spe_, t2_lim, spe_lim)
    flagged = np.flatnonzero(regions != "inside")
    severity = np.maximum(model.t2_[flagged] / t2_lim, model.spe_[flagged] / spe_lim)
    flagged = flagged[np.argsort(-severity, kind="stable")]
    shown = flagged[:OUTLIER_ROWS]
    from webapp.services import ingest, modelling

    table = ingest.load_table(int(result["dataset_id"]))
    meta = _training_frame(result["dataset_id"], model)
    values = table.data.loc[[model.sample_ids_[i] for i in shown], list(model.variable_names_)]
    robust = result.get("method") == "robust"
    words = dict(zip(("inside", "t2", "spe", "both"), figures.MAP_REGION_TEXT)) if robust else REGION_WORDS
    rows = []
    for i, (_, x) in zip(shown, values.iterrows()):
        sid = model.sample_ids_[i]
        explained = modelling.explain(model, x.to_numpy(dtype=np.float64), sid, confidence, top=3)
        top = [v["variable"] for v in explained["variables"][:3]]
        row = {"sample_id": sid, "region": words[regions[i]], "T2": float(model.t2_[i]),
               "T2 / limit": float(model.t2_[i] / t2_lim), "SPE": float(model.spe_[i]),
               "SPE / limit": float(model.spe_[i] / spe_lim), "top variables": ", ".join(top)}
        for col in meta.columns:
            value = meta.iloc[i][col]
            row[f"meta: {col}"] = None if pd.isna(value) else str(value)
        rows.append(row)
    number = {"type": "numericColumn", "filter": False, "minWidth": 108,
              "valueFormatter": {"function": "d3.format('.3~g')(params.value)"}}
    t2_name, spe_name = ("SD²", "OD²") if robust else ("T²", "SPE")
    columns = [{"field": "sample_id", "headerName": "Sample", "pinned": "left", "minWidth": 110},
               {"field": "region", "headerName": "Region" if robust else "Beyond", "minWidth": 150},
               {"field": "top variables", "headerName": "Mainly because of", "minWidth": 260, "flex": 3},
               {"field": "T2", "headerName": t2_name, **number},
               {"field": "T2 / limit", "headerName": f"{t2_name} / limit", **number},
               {"field": "SPE", "headerName": spe_name, **number},
               {"field": "SPE / limit", "headerName": f"{spe_name} / limit", **number}]
    columns += [{"field": f"meta: {c}", "headerName": str(c)} for c in meta.columns]
    level = f"{100 * confidence:g}%"
    if robust:
        note = (f"Robust fit: {flagged.size} of {model.n_samples_} samples are beyond the {level} score- or "
                f"orthogonal-distance cut-off (SD {np.sqrt(t2_lim):.3g}, OD {np.sqrt(spe_lim):.3g}; "
                "the table lists their squares).")
    else:
        note = (f"{flagged.size} of {model.n_samples_} samples are beyond the {level} T² or SPE limit "
                f"(T² limit {t2_lim:.3g}, SPE limit {spe_lim:.3g}).")
    if flagged.size > shown.size:
        note += f" The {shown.size} most extreme are listed."
    if flagged.size:
        note += " Click a row to see why."
    return rows, columns, note


def clicked_sample(event: dict | None) -> str | None:
    """The sample id of a clicked point (points carry the id as escaped text)."""
    points = (event or {}).get("points") or []
    for point in points:
        text = point.get("text")
        if text is not None:
            return html_text.unescape(str(text))
    return None


def stored_selection(selection: dict | None) -> list[str]:
    """The sample ids of the selection store (any model's: ids the fit lacks are not drawn)."""
    return list((selection or {}).get("sample_ids") or [])


def shows_selection(graph_id: str, selection: dict | None) -> bool:
    """True when the selection store holds the box or lasso selection just made on this
    plot: plotly.js already draws it, so the figure need not be sent again. Any other
    store (Clear, a saved view, another plot's drag) has to be drawn. (The plot's own
    ``selectedData`` is not read: with many samples it is megabytes.)"""
    return (selection or {}).get("drawn_on") == graph_id


def selected_samples(event: dict | None) -> list[str]:
    """Sample ids of a box or lasso selection (unique, in the order received)."""
    seen: dict[str, None] = {}
    for point in (event or {}).get("points") or []:
        text = point.get("text")
        if text is not None:
            seen.setdefault(html_text.unescape(str(text)), None)
    return list(seen)


# --------------------------------------------------------------- callbacks
@callback(
    Output(ids.GRAPH_SCORES, "figure"),
    Output(ids.SCORE_DRAWN, "data"),
    Input(ids.FIT_RESULT, "data"),
    Input(ids.VIEW_PCX, "value"),
    Input(ids.VIEW_PCY, "value"),
    Input(ids.VIEW_COLOUR, "value"),
    Input(ids.VIEW_SHAPE, "value"),
    Input(ids.VIEW_LABELS, "value"),
    Input(ids.SELECTION_STORE, "data"),
    State(ids.VIEW_SAMPLE, "data"),
    State(ids.SCORE_DRAWN, "data"),
)
def _scores(result, pcx, pcy, colour, shape, labels, selection, sample, drawn):
    if ctx.triggered_id == ids.SELECTION_STORE and shows_selection(ids.GRAPH_SCORES, selection):
        return no_update, no_update
    return score_update(result, pcx=pcx, pcy=pcy, colour=colour, shape=shape, labels=bool(labels), sample=sample,
                        drawn=drawn, selected=stored_selection(selection))


@callback(
    Output(ids.GRAPH_LOADINGS, "figure"),
    Input(ids.FIT_RESULT, "data"),
    Input(ids.VIEW_PCX, "value"),
    Input(ids.VIEW_PCY, "value"),
    Input(ids.VIEW_LOADINGS, "value"),
    Input(ids.VIEW_COLOUR, "value"),
)
def _loadings(result, pcx, pcy, mode, colour):
    return loading_view(result, pcx=pcx, pcy=pcy, mode=mode or "plot", colour=colour)


@callback(
    Output(ids.GRAPH_T2_SPE, "figure"),
    Output(ids.GRAPH_T2_CHART, "figure"),
    Output(ids.GRAPH_SPE_CHART, "figure"),
    Input(ids.FIT_RESULT, "data"),
    Input(ids.VIEW_ORDER, "value"),
    Input(ids.SELECTION_STORE, "data"),
    State(ids.VIEW_SAMPLE, "data"),
)
def _diagnostics(result, order, selection, sample):
    figs = diagnostics_view(result, order=order, sample=sample, selected=stored_selection(selection))
    if ctx.triggered_id != ids.SELECTION_STORE:
        return figs
    # a new selection: the plot it was drawn on already shows it, the other two are drawn again
    graphs = (ids.GRAPH_T2_SPE, ids.GRAPH_T2_CHART, ids.GRAPH_SPE_CHART)
    return tuple(no_update if shows_selection(graph, selection) else fig for graph, fig in zip(graphs, figs))


@callback(
    Output(ids.GRAPH_VARIANCE, "figure"),
    Output(ids.RANK_TABLE, "children"),
    Output(ids.GRAPH_VARIABLE_EXPLAINED, "figure"),
    Input(ids.FIT_RESULT, "data"),
    Input(ids.RANK_STORE, "data"),
)
def _variance(result, rank):
    if rank and result and rank.get("fingerprint") != result.get("fingerprint"):
        rank = None  # computed for another fit
    return variance_view(result, (rank or {}).get("rank"))


@callback(
    Output(ids.RANK_STORE, "data"),
    Input(ids.RANK_BUTTON, "n_clicks"),
    State(ids.FIT_RESULT, "data"),
    background=True,
    running=[(Output(ids.RANK_BUTTON, "disabled"), True, False),
             (Output(ids.RANK_STATUS, "children"), " Computing…", "")],
    prevent_initial_call=True,
)
def _rank(clicks, result):
    from webapp import jobs
    from webapp.services import modelling

    if not clicks or not result or not result.get("ok"):
        return no_update
    with jobs.app_context():
        rank = modelling.rank_summary(result["dataset_id"], result["settings"])
    return {"fingerprint": result["fingerprint"], "rank": rank}


@callback(
    Output(ids.OUTLIER_GRID, "rowData"),
    Output(ids.OUTLIER_GRID, "columnDefs"),
    Output(ids.OUTLIER_NOTE, "children"),
    Input(ids.FIT_RESULT, "data"),
)
def _outliers(result):
    return outlier_rows(result)


@callback(
    Output(ids.VIEW_PCX, "options"),
    Output(ids.VIEW_PCY, "options"),
    Input(ids.FIT_RESULT, "data"),
)
def _axis_options(result):
    n_comp = (result or {}).get("n_components") or 2
    options = [{"label": f"PC{a}", "value": a} for a in range(1, int(n_comp) + 1)]
    return options, options


def _click_callback(graph_id: str) -> None:
    @callback(
        Output(ids.VIEW_SAMPLE, "data", allow_duplicate=True),
        Input(graph_id, "clickData"),
        prevent_initial_call=True,
    )
    def _clicked(event):
        sample = clicked_sample(event)
        return sample if sample is not None else no_update

    @callback(
        Output(ids.SELECTION_STORE, "data", allow_duplicate=True),
        Input(graph_id, "selectedData"),
        State(ids.SELECTION_STORE, "data"),
        State(ids.FIT_RESULT, "data"),
        prevent_initial_call=True,
    )
    def _selected(event, current, result):
        if not is_drawn_selection(event):
            return no_update
        return selection_data(event, current, result, graph_id)


def is_drawn_selection(event: dict | None) -> bool:
    """True for a box or lasso a person drew (plotly.js sends its ``range`` or
    ``lassoPoints``). A redraw after a refit makes plotly.js send an empty
    selection without either; taking that would lose the selection the user
    made, so the selection store keeps it (it survives a refit)."""
    return bool(event) and ("range" in event or "lassoPoints" in event)


def selection_data(event: dict | None, current: dict | None, result: dict | None,
                   drawn_on: str | None = None) -> dict:
    """The selection store after a box or lasso selection on the plot ``drawn_on``."""
    return {
        "dataset_id": (current or {}).get("dataset_id") or (result or {}).get("dataset_id"),
        "fingerprint": (result or {}).get("fingerprint"),
        "sample_ids": selected_samples(event),
        "drawn_on": drawn_on,
    }


for _graph_id in (ids.GRAPH_SCORES, ids.GRAPH_T2_SPE, ids.GRAPH_T2_CHART, ids.GRAPH_SPE_CHART):
    _click_callback(_graph_id)


@callback(
    Output(ids.VIEW_SAMPLE, "data", allow_duplicate=True),
    Input(ids.OUTLIER_GRID, "cellClicked"),
    prevent_initial_call=True,
)
def _row_clicked(cell):
    sample = (cell or {}).get("rowId")
    return sample if sample else no_update


@callback(
    Output(ids.VIEW_SAMPLE, "data", allow_duplicate=True),
    Input(ids.OUTLIER_GRID, "selectedRows"),
    prevent_initial_call=True,
)
def _row_selected(rows):
    # Space on a row of the table selects it without a click: the keyboard way to explain it.
    sample = ((rows or [{}])[-1] or {}).get("sample_id")
    return sample if sample else no_update


# Pictures: PNG or SVG of any plot, drawn by plotly.js in the browser, named after the
# dataset, the plot and its axes ("demo_lab_batches-scores-PC1-PC2.png").
clientside_callback(
    r"""
    function (clicks) {
        const trigger = dash_clientside.callback_context.triggered_id;
        if (!trigger || !clicks || clicks.every(c => !c)) { return dash_clientside.no_update; }
        const holder = document.getElementById(trigger.graph);
        const plot = holder && holder.querySelector('.js-plotly-plot');
        if (!plot) { return dash_clientside.no_update; }
        const slug = text => String(text).trim().replace(/\.(csv|tsv|txt|xlsx)$/i, '')
            .replace(/[^A-Za-z0-9_.-]+/g, '-').replace(/^-+|-+$/g, '');
        const heading = document.querySelector('.ld-dataset-title');
        const parts = [slug(heading ? heading.textContent : 'latentdesk') || 'latentdesk',
                       trigger.graph.replace(/^graph-/, '')];
        const layout = plot.layout || {};
        for (const axis of ['xaxis', 'yaxis']) {
            const title = ((layout[axis] || {}).title || {}).text || '';
            const pc = title.match(/PC\d+/);
            if (pc) { parts.push(pc[0]); }
        }
        Plotly.downloadImage(plot, {format: trigger.format, filename: parts.join('-'), scale: 2});
        return dash_clientside.no_update;
    }
    """,
    Output(ids.image_button(ALL, ALL), "title"),
    Input(ids.image_button(ALL, ALL), "n_clicks"),
    prevent_initial_call=True,
)
