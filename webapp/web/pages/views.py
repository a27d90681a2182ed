"""Saved views: the list (``/views``, ``?dataset=`` narrows it) and the save form.

``/views?save=1&dataset=<id>&sel=...&<view state>`` (``url_state.save_view_url``,
linked from a dataset page) shows what will be saved and asks for a title and a
note; saving gives the shareable link.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp.web.pages.review import when
from webapp import url_state
from webapp.web.ui import ids

dash.register_page(__name__, path="/views", name="Saved views", title="Saved views · LatentDesk", nav=True,
                   order=30)


def views_table(views: list[dict], names: dict[int, str]) -> html.Table | html.P:
    if not views:
        return html.P("No saved views yet. Save one from a dataset page.", className="ld-muted")
    header = html.Tr([html.Th("Title"), html.Th("Dataset"), html.Th("Note"), html.Th("Saved by"),
                      html.Th("Model")])
    rows = [
        html.Tr(
            [
                html.Td(dcc.Link(v["title"], href=v["url"])),
                html.Td(names.get(v["dataset_id"], str(v["dataset_id"]))),
                html.Td(v["note"]),
                html.Td([v["created_by_name"] or "", html.Br(),
                         html.Span(when(v["created_at"]), className="ld-muted")]),
                html.Td((v["model_fingerprint"] or "")[:12] + "…", title=v["model_fingerprint"] or "",
                        className="ld-muted ld-mono"),
            ]
        )
        for v in views
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def _save_form(dataset_id: int, query: dict, selection: list[str]) -> html.Section:
    state, notes = url_state.parse_query(query)
    if not auth.has_role(current_user.role, "analyst"):
        return html.Section(html.P("Your role can open views but not save them.", className="ld-muted"),
                            className="ld-panel")
    settings = state.model_settings([])
    summary = (
        f"{state.scaling}, {settings['components'] if settings['components'] != 'auto' else 'auto'} component(s), "
        f"tab {state.tab}, PC{state.pcx} vs PC{state.pcy}"
        + (f", coloured by {state.colour}" if state.colour else "")
        + (f", {len(selection)} selected sample(s)" if selection else "")
        + (f", what-if without {', '.join(state.exclude)}" if state.exclude else "")
    )
    return html.Section(
        [
            html.H2("Save this view"),
            html.P(summary, className="ld-muted"),
            *[html.P(n, className="ld-alert") for n in notes],
            dcc.Store(id=ids.VIEW_SAVE_CONTEXT, data={"dataset_id": dataset_id, "query": url_state.to_query(state),
                                                      "selection": selection}),
            html.Div(
                [
                    html.Label("Title", htmlFor=ids.VIEW_SAVE_TITLE),
                    dcc.Input(id=ids.VIEW_SAVE_TITLE, className="ld-input", maxLength=300),
                    html.Label("Note", htmlFor=ids.VIEW_SAVE_NOTE),
                    dcc.Textarea(id=ids.VIEW_SAVE_NOTE, className="ld-textarea", maxLength=4000),
                    html.Button("Save view", id=ids.VIEW_SAVE_BUTTON, className="ld-button"),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.VIEW_SAVE_MESSAGE, role="status"),
        ],
        className="ld-panel",
    )


def layout(save=None, dataset=None, sel=None, **query) -> html.Div:
    from webapp.services import views
    from webapp.services.ingest import list_datasets

    dataset_id = int(dataset) if isinstance(dataset, str) and dataset.isdigit() else None
    names = {d["id"]: d["name"] for d in list_datasets()}
    selection = [str(s) for s in sel] if isinstance(sel, (list, tuple)) else ([str(sel)] if sel else [])
    form = _save_form(dataset_id, query, selection) if save == "1" and dataset_id in names else None
    title = f"Saved views · {names[dataset_id]}" if dataset_id in names else "Saved views"
    return html.Div(
        [
            html.H1(title),
            form,
            html.Section(html.Div(views_table(views.list_views(dataset_id), names), id=ids.VIEWS_LIST),
                         className="ld-panel"),
        ]
    )


def save(context: dict, title: str | None, note: str | None):
    """Save for the signed-in user; returns the message component."""
    from webapp.services import views

    try:
        view = views.save_view(current_user, int(context["dataset_id"]), query=context["query"], title=title,
                               note=note or "", selection=context.get("selection") or [])
    except InputError as exc:
        return html.P(str(exc), className="ld-alert")
    return html.P(["Saved. Link to share: ", dcc.Link(view["url"], href=view["url"])], className="ld-success")


@callback(
    Output(ids.VIEW_SAVE_MESSAGE, "children"),
    Input(ids.VIEW_SAVE_BUTTON, "n_clicks"),
    State(ids.VIEW_SAVE_CONTEXT, "data"),
    State(ids.VIEW_SAVE_TITLE, "value"),
    State(ids.VIEW_SAVE_NOTE, "value"),
    prevent_initial_call=True,
)
def _on_save(n_clicks, context, title, note):
    if not n_clicks or not context:
        return no_update
    return save(context, title, note)
