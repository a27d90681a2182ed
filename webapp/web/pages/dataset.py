"""The dataset page: model settings, the fit (a background job) and the view state.

``/datasets/<id>?<view state>``: the query string holds everything on screen
(``webapp.url_state``), so a reload, the back button or a copied link shows
the same thing. This module owns the frame of the page, the settings form,
the fit and the URL; the tabs' contents and their callbacks live in
``dataset_views`` (plots, outlier table) and ``dataset_samples`` (explanation,
selection, downloads).

Callbacks stay thin: each hands its inputs to a plain function below, which
calls a service and a figure builder; the plain functions are what the tests call.
"""

from __future__ import annotations

import time
from typing import Any

import dash
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from dash.exceptions import PreventUpdate
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth, jobs
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.ui import fields, ids
from webapp.url_state import ViewState

dash.register_page(
    __name__,
    path_template=url_state.dataset_path_template(),
    name="Dataset",
    title="Dataset · LatentDesk",
)

SCALING_LABELS = {
    "autoscale": "Autoscale (centre, unit variance)",
    "center": "Centre only",
    "pareto": "Pareto (centre, divide by sqrt of SD)",
    "none": "None",
}
CONFIDENCE_LABELS = {0.9: "90%", 0.95: "95%", 0.99: "99%"}
METHOD_LABELS = {
    "classical": "Classical PCA",
    "robust": "Robust PCA (ROBPCA)",
}
TAB_LABELS = {
    "variance": "Variance",
    "scores": "Scores",
    "loadings": "Loadings",
    "diagnostics": "Diagnostics",
    "screening": "Respondent screening",
    "outliers": "Outliers",
}
MAX_COMPONENT_CHOICES = 20
FIT_POLL_MS = 200


# ----------------------------------------------------------------- helpers
def dataset_or_none(dataset_id) -> dict | None:
    """The dataset record, or None for an id that is not a stored dataset."""
    from webapp.services import ingest

    known = parse_id(dataset_id)
    if known is None:
        return None
    try:
        return ingest.dataset_info(known)
    except ingest.DatasetNotFound:
        return None


def applied_settings(state: ViewState) -> dict[str, Any]:
    """The model part of the view state, as kept in the SETTINGS_APPLIED store."""
    return {
        "components": state.components,
        "scaling": state.scaling,
        "log10": list(state.log10),
        "drop": list(state.drop),
        "exclude": list(state.exclude),
        "include_all": state.include_all,
        "confidence": state.confidence,
        "method": state.method,
    }


def state_with_applied(state: ViewState, applied: dict | None) -> ViewState:
    """``state`` with its model settings taken from an applied-settings dict."""
    if not applied:
        return state
    return state.with_changes(
        components=applied.get("components"),
        scaling=applied.get("scaling", state.scaling),
        log10=applied.get("log10") or (),
        drop=applied.get("drop") or (),
        exclude=applied.get("exclude") or (),
        include_all=bool(applied.get("include_all")),
        confidence=float(applied.get("confidence", state.confidence)),
        method=applied.get("method") or state.method,
    )


def _components_value(state: ViewState) -> str:
    return "auto" if state.components is None else str(state.components)


def form_values(state: ViewState) -> dict[str, Any]:
    """Values of the settings form for a state."""
    return {
        "drop": list(state.drop),
        "log10": list(state.log10),
        "scaling": state.scaling,
        "components": _components_value(state),
        "confidence": state.confidence,
        "method": state.method,
    }


def view_values(state: ViewState) -> dict[str, Any]:
    """Values of the view controls for a state."""
    return {
        "tab": state.tab,
        "pcx": state.pcx,
        "pcy": state.pcy,
        "colour": state.colour,
        "shape": state.shape,
        "labels": ["on"] if state.labels else [],
        "loadings": state.loadings,
        "order": state.order,
        "sample": state.sample,
    }


def state_from_controls(view: dict[str, Any], applied: dict | None) -> ViewState:
    """The ViewState the view controls and the applied model settings describe."""
    pcx = int(view.get("pcx") or 1)
    pcy = int(view.get("pcy") or 2)
    if pcx == pcy:
        pcy = 2 if pcx != 2 else 1
    base = ViewState(
        tab=view.get("tab") or "scores",
        pcx=pcx,
        pcy=pcy,
        colour=view.get("colour") or None,
        shape=view.get("shape") or None,
        labels=bool(view.get("labels")),
        loadings=view.get("loadings") or "plot",
        order=view.get("order") or None,
        sample=view.get("sample") or None,
    )
    return state_with_applied(base, applied)


def settings_from_form(form: dict[str, Any], current: dict | None) -> dict[str, Any]:
    """Applied settings after pressing fit: the form's values, the current exclusions kept."""
    components = form.get("components")
    return {
        "components": None if components in (None, "", "auto") else int(components),
        "scaling": form.get("scaling") or "autoscale",
        "log10": [v for v in (form.get("log10") or []) if v not in set(form.get("drop") or [])],
        "drop": list(form.get("drop") or []),
        "exclude": list((current or {}).get("exclude") or []),
        "include_all": bool((current or {}).get("include_all")),
        "confidence": float(form.get("confidence") or 0.95),
        "method": form.get("method") or "classical",
    }


def sync_state(trigger: str | None, search: str | None, view: dict, applied: dict | None,
               form: dict) -> tuple[ViewState, list[str], bool]:
    """Decide the page state after one change.

    ``trigger`` is the id that changed: the location (a reload, back/forward:
    the URL wins), the fit button (the form becomes the applied settings) or a
    view control (the controls win). Returns the state, notes about ignored
    link values, and whether the controls must be set from the state.
    """
    if trigger in (None, ids.DATASET_LOCATION):
        state, notes = url_state.parse_query(search or "")
        return state, notes, True
    if trigger == ids.SETTINGS_FIT:
        applied = settings_from_form(form, applied)
    return state_from_controls(view, applied), [], False


def deciding_trigger(triggered: list) -> str | None:
    """The change ``sync_state`` follows when several inputs changed in one round trip.

    The address wins only when it changed alone (a reload, back/forward). When a
    control and the address arrive together, the address is this page's own
    earlier write and the control is the newer intent: following the address
    would undo the user's change (a tab jumping back)."""
    changed = [t for t in triggered if t is not None]
    if not changed:
        return None
    others = [t for t in changed if t != ids.DATASET_LOCATION]
    return others[0] if others else ids.DATASET_LOCATION


def initial_selection(dataset_id: int, query, user) -> tuple[dict[str, Any], list[str]]:
    """The selection store's first value, and notes: the selection of the saved view the
    link names (``view=<id>``, ``webapp.services.views.saved_selection``), else nothing."""
    from webapp.services import views

    empty = {"dataset_id": dataset_id, "sample_ids": []}
    view_id = url_state.view_id_from_query(query)
    if view_id is None:
        return empty, []
    try:
        chosen = views.saved_selection(view_id, dataset_id, user)
    except views.ViewNotFound:
        return empty, [f"There is no saved view {view_id!r}; nothing is selected."]
    except InputError as exc:
        return empty, [f"The selection of the saved view was not restored: {exc}."]
    return {"dataset_id": dataset_id, "sample_ids": chosen}, []


def fit_summary(dataset_id: int, applied: dict | None, user_id: int | None = None) -> dict[str, Any]:
    """Fit (or fetch from the cache) the model the applied settings describe.

    Returns the JSON-safe result kept in the FIT_RESULT store: ``ok``, the
    model's id, fingerprint, ``cache_hit``, ``seconds``, the summary numbers,
    the component-choice table (``rank``; only when the number of components
    was left at "Recommended": with a number given the table is computed on
    request, see ``rank_summary``) and the settings the service normalised.
    Bad settings give ``ok: False`` and the service's message.
    """
    from webapp.services import ingest, modelling

    started = time.perf_counter()
    state = state_with_applied(ViewState(), applied)
    try:
        dataset = ingest.dataset_info(int(dataset_id))
        settings = state.model_settings(dataset["variables"])
        model, info = modelling.get_model(int(dataset_id), settings, user_id=user_id)
        rank = info.get("rank")
    except InputError as exc:
        return {"ok": False, "error": str(exc)}
    keep = ("id", "fingerprint", "cache_hit", "settings", "excluded", "n_components", "n_samples",
            "n_variables", "variables", "dropped_variables", "explained_variance_ratio", "cumulative",
            "eigenvalues", "confidence", "t2_limit", "spe_limit", "solver", "n_missing", "imputation", "warnings",
            "what_if", "approved_exclusions", "method", "robust")
    result = {key: info.get(key) for key in keep}
    result.update(ok=True, rank=rank, dataset_id=int(dataset_id), seconds=round(time.perf_counter() - started, 3))
    return result


# ------------------------------------------------------------------ layout
def _field(label: str, control, hint: str | None = None, class_name: str = "") -> html.Div:
    children = [fields.field_label(label, control), control]
    if hint:
        children.append(html.Div(hint, className="ld-field-hint"))
    return html.Div(children, className=f"ld-field {class_name}".strip())


def _settings_form(dataset: dict, state: ViewState, can_fit: bool) -> html.Section:
    variables = dataset["variables"]
    options = [{"label": v, "value": v} for v in variables]
    most = max(1, min(MAX_COMPONENT_CHOICES, len(variables), max(1, dataset["n_samples"] - 1)))
    comp_options = [{"label": "Recommended", "value": "auto"}] + [
        {"label": str(a), "value": str(a)} for a in range(1, most + 1)
    ]
    form = form_values(state)
    return html.Section(
        [
            html.Div(
                [
                    _field("Scaling", dcc.Dropdown(
                        id=ids.SETTINGS_SCALING, value=form["scaling"], clearable=False, searchable=False,
                        options=[{"label": label, "value": key} for key, label in SCALING_LABELS.items()],
                        disabled=not can_fit), class_name="ld-field-scaling"),
                    _field("Components", dcc.Dropdown(
                        id=ids.SETTINGS_COMPONENTS, value=form["components"], options=comp_options,
                        clearable=False, searchable=False, disabled=not can_fit),
                        class_name="ld-field-components"),
                    _field("Confidence", dcc.Dropdown(
                        id=ids.SETTINGS_CONFIDENCE, value=form["confidence"], clearable=False, searchable=False,
                        options=[{"label": label, "value": level} for level, label in CONFIDENCE_LABELS.items()],
                        disabled=not can_fit),
                        class_name="ld-field-narrow"),
                    _field("Method", dcc.Dropdown(
                        id=ids.SETTINGS_METHOD, value=form["method"], clearable=False, searchable=False,
                        options=[{"label": label, "value": key} for key, label in METHOD_LABELS.items()],
                        disabled=not can_fit), class_name="ld-field-method"),
                    _field("Leave out variables", dcc.Dropdown(
                        id=ids.SETTINGS_DROP, value=form["drop"], options=options, multi=True,
                        placeholder="all variables in", disabled=not can_fit), class_name="ld-field-wide"),
                    _field("log10 before scaling", dcc.Dropdown(
                        id=ids.SETTINGS_LOG10, value=form["log10"], options=options, multi=True,
                        placeholder="none", disabled=not can_fit), class_name="ld-field-wide"),
                    html.Div(
                        html.Button("Fit model", id=ids.SETTINGS_FIT, n_clicks=0, className="ld-button",
                                    disabled=not can_fit),
                        className="ld-field ld-field-button",
                    ),
                ],
                className="ld-settings-row",
            ),
            html.Div(
                [
                    html.Progress(id=ids.FIT_PROGRESS, className="ld-progress", max=3, value=0,
                                  style={"display": "none"}),
                    html.Span(id=ids.FIT_STATUS, className="ld-muted", role="status"),
                    html.Span(id=ids.SETTINGS_RECOMMENDATION, className="ld-recommendation"),
                    html.Span(id=ids.FIT_SOURCE, className="ld-muted ld-fit-source"),
                ],
                className="ld-fit-line",
            ),
            html.Div(id=ids.SETTINGS_EXCLUDED, className="ld-excluded"),
            html.Div(id=ids.FIT_WARNINGS, className="ld-fit-warnings"),
            html.Div(id=ids.FIT_ERROR, role="alert"),
        ],
        className="ld-panel ld-settings",
        **{"aria-label": "Model settings"},
    )


def _view_toolbar(dataset: dict, state: ViewState) -> html.Div:
    meta = dataset.get("metadata_columns") or []
    meta_options = [{"label": m, "value": m} for m in meta]
    pcs = [{"label": f"PC{a}", "value": a} for a in range(1, MAX_COMPONENT_CHOICES + 1)]
    values = view_values(state)
    return html.Div(
        [
            html.Div(
                [
                    _field("x axis", dcc.Dropdown(id=ids.VIEW_PCX, value=values["pcx"], options=pcs,
                                                  clearable=False, searchable=False), class_name="ld-field-narrow"),
                    _field("y axis", dcc.Dropdown(id=ids.VIEW_PCY, value=values["pcy"], options=pcs,
                                                  clearable=False, searchable=False), class_name="ld-field-narrow"),
                    _field("Colour by", dcc.Dropdown(id=ids.VIEW_COLOUR, value=values["colour"], options=meta_options,
                                                     placeholder="no colouring")),
                    _field("Shape by", dcc.Dropdown(id=ids.VIEW_SHAPE, value=values["shape"], options=meta_options,
                                                    placeholder="one shape")),
                    _field("Labels", dcc.Checklist(id=ids.VIEW_LABELS, value=values["labels"],
                                                   options=[{"label": " sample ids", "value": "on"}],
                                                   className="ld-check")),
                ],
                id=ids.VIEW_AXES_ROW,
                className="ld-toolbar-group",
            ),
            html.Div(
                _field("Show", dcc.RadioItems(
                    id=ids.VIEW_LOADINGS, value=values["loadings"], inline=True, className="ld-radio",
                    options=[{"label": " loading plot", "value": "plot"}, {"label": " biplot", "value": "biplot"},
                             {"label": " bars per component", "value": "bars"}])),
                id=ids.VIEW_LOADINGS_ROW,
                className="ld-toolbar-group",
            ),
            html.Div(
                _field("Control charts against", dcc.Dropdown(
                    id=ids.VIEW_ORDER, value=values["order"], options=meta_options, placeholder="sample order")),
                id=ids.VIEW_ORDER_ROW,
                className="ld-toolbar-group",
            ),
        ],
        className="ld-toolbar",
    )


def _not_found(dataset_id) -> html.Div:
    return html.Div(
        [html.H1("Dataset not found"),
         html.P(f"There is no dataset with id {dataset_id!s}.", className="ld-alert"),
         dcc.Link("Back to the datasets", href=url_state.home_url())]
    )


def layout(dataset_id=None, **query) -> html.Div:
    from webapp.web.pages import dataset_samples, dataset_tabs, dataset_views
    from webapp.web.pages.review_links import review_links
    from webapp.web.pages.monitoring_link import reference_model_link

    dataset = dataset_or_none(dataset_id)
    if dataset is None:
        return _not_found(dataset_id)
    state, notes = url_state.parse_query(query)
    selection, selection_notes = initial_selection(dataset["id"], query, current_user)
    notes += selection_notes
    can_fit = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return html.Div(
        [
            dcc.Location(id=ids.DATASET_LOCATION, refresh=False),
            dcc.Store(id=ids.DATASET_ID, data=dataset["id"]),
            dcc.Store(id=ids.SETTINGS_APPLIED, data=applied_settings(state)),
            dcc.Store(id=ids.FIT_RESULT),
            dcc.Store(id=ids.VIEW_SAMPLE, data=state.sample),
            dcc.Store(id=ids.SELECTION_STORE, data=selection),
            html.Div(
                [
                    html.Div(
                        [html.H1(dataset["name"], className="ld-dataset-title"),
                         html.Div(f"{dataset['n_samples']} samples × {dataset['n_variables']} variables"
                                  f" · SHA-256 {dataset['sha256'][:12]}", className="ld-muted")],
                    ),
                    dataset_samples.downloads(),
                    review_links(dataset["id"]),
                    reference_model_link(),
                ],
                className="ld-dataset-head",
            ),
            html.Div([html.P(n) for n in notes], id=ids.DATASET_NOTES, className="ld-notes"),
            html.Div(id=ids.VIEW_BANNER, role="status"),  # a saved view's link: filled by views_open
            _settings_form(dataset, state, can_fit),
            dcc.Store(id=ids.VIEW_TABS, data=state.tab),  # the open tab (dataset_tabs)
            dataset_tabs.tab_list(TAB_LABELS, state.tab),
            dataset_tabs.tab_panel([
                _view_toolbar(dataset, state),
                html.Div(
                    [
                        html.Div(dataset_views.tab_content(state.tab), id=ids.VIEW_CONTENT, className="ld-view-main"),
                        html.Aside(dataset_samples.side_panels(), className="ld-view-side"),
                    ],
                    className="ld-explore-grid",
                ),
            ], state.tab),
        ],
        className="ld-dataset-page",
    )


# --------------------------------------------------------------- callbacks
_VIEW_INPUTS = [
    (ids.VIEW_TABS, "data", "tab"),
    (ids.VIEW_PCX, "value", "pcx"),
    (ids.VIEW_PCY, "value", "pcy"),
    (ids.VIEW_COLOUR, "value", "colour"),
    (ids.VIEW_SHAPE, "value", "shape"),
    (ids.VIEW_LABELS, "value", "labels"),
    (ids.VIEW_LOADINGS, "value", "loadings"),
    (ids.VIEW_ORDER, "value", "order"),
    (ids.VIEW_SAMPLE, "data", "sample"),
]
_FORM_FIELDS = [
    (ids.SETTINGS_DROP, "drop"),
    (ids.SETTINGS_LOG10, "log10"),
    (ids.SETTINGS_SCALING, "scaling"),
    (ids.SETTINGS_COMPONENTS, "components"),
    (ids.SETTINGS_CONFIDENCE, "confidence"),
    (ids.SETTINGS_METHOD, "method"),
]


@callback(
    output=dict(
        search=Output(ids.DATASET_LOCATION, "search"),
        notes=Output(ids.DATASET_NOTES, "children"),
        applied=Output(ids.SETTINGS_APPLIED, "data"),
        view=[Output(cid, prop) for cid, prop, _ in _VIEW_INPUTS],
        form=[Output(cid, "value") for cid, _ in _FORM_FIELDS],
    ),
    inputs=dict(
        search=Input(ids.DATASET_LOCATION, "search"),
        _clicks=Input(ids.SETTINGS_FIT, "n_clicks"),
        applied=Input(ids.SETTINGS_APPLIED, "data"),
        view_list=[Input(cid, prop) for cid, prop, _ in _VIEW_INPUTS],
        form_list=[State(cid, "value") for cid, _ in _FORM_FIELDS],
        pathname=State(ids.DATASET_LOCATION, "pathname"),
        dataset_id=State(ids.DATASET_ID, "data"),
    ),
)
def _sync(search, _clicks, applied, view_list, form_list, pathname, dataset_id):
    if pathname != url_state.dataset_url(dataset_id):
        # A link to another page changed the address while this page is still mounted:
        # its query string is that page's, not this view's state.
        raise PreventUpdate
    view = {key: value for (_, _, key), value in zip(_VIEW_INPUTS, view_list)}
    form = {key: value for (_, key), value in zip(_FORM_FIELDS, form_list)}
    trigger = deciding_trigger(list((ctx.triggered_prop_ids or {}).values()))
    state, notes, set_controls = sync_state(trigger, search, view, applied, form)
    query = url_state.page_query(state, url_state.view_id_from_query(search))  # keeps view=<id>
    new_search = f"?{query}" if query else ""
    new_applied = applied_settings(state)
    out = {
        "search": new_search if new_search != (search or "") else no_update,
        "notes": no_update,
        "applied": new_applied if new_applied != applied else no_update,
        "view": [no_update] * len(_VIEW_INPUTS),
        "form": [no_update] * len(_FORM_FIELDS),
    }
    if set_controls:
        views, forms = view_values(state), form_values(state)
        out["view"] = [views[key] if views[key] != view[key] else no_update for _, _, key in _VIEW_INPUTS]
        out["form"] = [forms[key] if forms[key] != form[key] else no_update for _, key in _FORM_FIELDS]
        if notes:
            out["notes"] = [html.P(n) for n in notes]
    return out


@callback(
    Output(ids.FIT_RESULT, "data"),
    Output(ids.FIT_ERROR, "children"),
    Input(ids.SETTINGS_APPLIED, "data"),
    State(ids.DATASET_ID, "data"),
    background=True,
    interval=FIT_POLL_MS,
    progress=[Output(ids.FIT_PROGRESS, "value")],
    running=[
        (Output(ids.SETTINGS_FIT, "disabled"), True, False),
        (Output(ids.FIT_PROGRESS, "style"), {"display": "inline-block"}, {"display": "none"}),
        (Output(ids.FIT_STATUS, "children"), "Fitting the model…", ""),
    ],
    # No cancel on a change of address: the page is rebuilt when its query changes, and the new
    # address component's first value would kill the fit the rebuilt page has just started.
    # A fit left behind by navigation ends on its own and warms the model cache.
)
def _run_fit(set_progress, applied, dataset_id):
    set_progress(1)
    with jobs.app_context():
        result = fit_summary(dataset_id, applied)
    set_progress(3)
    if not result["ok"]:
        return None, html.P(result["error"], className="ld-alert")
    return result, None


@callback(
    Output(ids.SETTINGS_RECOMMENDATION, "children"),
    Output(ids.FIT_SOURCE, "children"),
    Output(ids.SETTINGS_EXCLUDED, "children"),
    Output(ids.FIT_WARNINGS, "children"),
    Input(ids.FIT_RESULT, "data"),
)
def _fit_line(result):
    return *fit_line(result), fit_warnings(result)


def fit_warnings(result: dict | None):
    """The fit's warnings as a list, with how the missing cells were filled."""
    if not result or not result.get("ok"):
        return None
    items = [html.Li(w) for w in result.get("warnings") or []]
    imputation = result.get("imputation")
    if imputation:
        method = ("regularised iterative PCA (Josse & Husson 2012)" if imputation["method"] == "regularised"
                  else "iterative PCA (Walczak & Massart 2001)")
        items.insert(0, html.Li(
            f"{result['n_missing']} missing cell{'s' if result['n_missing'] != 1 else ''} filled by {method}: "
            f"{imputation['rounds']} rounds, last change {imputation['achieved']:.1e} of the data's RMS "
            f"(tolerance {imputation['tolerance']:.0e}); samples are scored on their observed values."
        ))
    return html.Ul(items, className="ld-muted") if items else None


def fit_line(result: dict | None):
    """Recommendation text, the model on screen, and the samples left out of it."""
    if not result or not result.get("ok"):
        return "", "", ""
    rank = result.get("rank") or {}
    rec = rank.get("recommended")
    recommendation = (
        html.Span(f"Recommended: {rec} component{'s' if rec != 1 else ''} (see Variance)", title=rank.get("rule", ""))
        if rec else "Recommendation: see Variance"
    )
    used = result["n_components"]
    robust = result.get("robust")
    how = f" of a robust fit (ROBPCA, h = {robust['h']})" if robust else ""
    source = (
        f"Showing {used} component{'s' if used != 1 else ''}{how}, model {result['fingerprint'][:10]}, "
        f"{'from the cache' if result['cache_hit'] else 'fitted'} in {result['seconds']:.2f} s"
    )
    excluded = result.get("excluded") or []
    if excluded:
        shown = ", ".join(excluded[:20]) + (f" and {len(excluded) - 20} more" if len(excluded) > 20 else "")
        # Approved exclusions (signed off, webapp.services.review) versus a what-if preview.
        signed = not result.get("what_if")
        label = "Left out by approved exclusions" if signed else "What-if preview, nothing recorded: left out"
        left_out = html.Div(
            [html.Span(f"{label} ({len(excluded)}): {shown} "),
             html.Button("Put them back", id=ids.SETTINGS_INCLUDE_ALL, n_clicks=0, className="ld-link-button",
                         hidden=signed)]
        )
    elif result.get("what_if"):  # include=all while exclusions are approved
        approved = result.get("approved_exclusions") or []
        left_out = html.Div(
            [html.Span(f"What-if preview, nothing recorded: no sample left out; the approved exclusions "
                       f"({len(approved)}: {', '.join(approved[:20])}{' and more' if len(approved) > 20 else ''}) "
                       "are back in the fit. "),
             html.Button("Put them back", id=ids.SETTINGS_INCLUDE_ALL, n_clicks=0, hidden=True)]
        )
    else:
        left_out = html.Button("Put them back", id=ids.SETTINGS_INCLUDE_ALL, n_clicks=0, hidden=True)
    return recommendation, source, left_out


@callback(
    Output(ids.SETTINGS_APPLIED, "data", allow_duplicate=True),
    Input(ids.SETTINGS_INCLUDE_ALL, "n_clicks"),
    State(ids.SETTINGS_APPLIED, "data"),
    prevent_initial_call=True,
)
def _include_all(clicks, applied):
    if not clicks or not applied or not applied.get("exclude"):
        return no_update
    return {**applied, "exclude": []}


@callback(
    Output(ids.VIEW_AXES_ROW, "hidden"),
    Output(ids.VIEW_LOADINGS_ROW, "hidden"),
    Output(ids.VIEW_ORDER_ROW, "hidden"),
    Output(ids.VIEW_CONTENT, "children"),
    Input(ids.VIEW_TABS, "data"),
)
def _show_tab(tab):
    from webapp.web.pages import dataset_views

    hidden = toolbar_hidden(tab)
    return hidden["axes"], hidden["loadings"], hidden["order"], dataset_views.tab_content(tab)


def toolbar_hidden(tab: str) -> dict[str, bool]:
    """Which toolbar groups a tab hides (axes/colour, loading view, control-chart order)."""
    return {
        "axes": tab not in ("scores", "loadings"),
        "loadings": tab != "loadings",
        "order": tab != "diagnostics",
    }
