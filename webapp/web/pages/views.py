"""Saved views: the list (``/views``, ``?dataset=`` narrows it) and the save form.

``/views?save=1&dataset=<id>&sel=...&<view state>`` (``url_state.save_view_url``,
linked from a dataset page) shows what will be saved and asks for a title and a
note; saving gives the shareable link as a full address (scheme and host of the
request) with a copy button, and refreshes the list below the form.

The copy button is a plain button with a small browser-side callback rather than
``dcc.Clipboard``: that component draws a ``div`` the keyboard never reaches and
draws nothing at all where the browser's Clipboard API is missing (a plain-http
address other than localhost), which is how many sites run this app.
"""

from __future__ import annotations

import dash
import flask
from dash import Input, Output, State, callback, clientside_callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp.web.pages.review import when
from webapp import url_state
from webapp.store.ids import parse_id
from webapp.web.ui import ids, messages
from webapp.auth.projects import visible_projects

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
        + (", what-if with no sample left out" if state.include_all and not state.exclude else "")
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


def _listed(dataset_id: int | None) -> html.Table | html.P:
    """The saved views (of one dataset, or all) as the list shows them."""
    from webapp.services import views
    from webapp.services.ingest import list_datasets

    names = {d["id"]: d["name"] for d in list_datasets(visible_projects(current_user))}
    return views_table([v for v in views.list_views(dataset_id) if v["dataset_id"] in names], names)


def layout(save=None, dataset=None, sel=None, **query) -> html.Div:
    from webapp.services.ingest import list_datasets

    dataset_id = parse_id(dataset)
    names = {d["id"]: d["name"] for d in list_datasets(visible_projects(current_user))}
    selection = [str(s) for s in sel] if isinstance(sel, (list, tuple)) else ([str(sel)] if sel else [])
    form = _save_form(dataset_id, query, selection) if save == "1" and dataset_id in names else None
    title = f"Saved views · {names[dataset_id]}" if dataset_id in names else "Saved views"
    return html.Div(
        [
            html.H1(title),
            form,
            html.Section(html.Div(_listed(dataset_id), id=ids.VIEWS_LIST),
                         className="ld-panel"),
        ]
    )


def save(context: dict, title: str | None, note: str | None, url_root: str):
    """Save for the signed-in user; returns (message, the refreshed list, or no_update after a refusal).

    ``url_root`` is the scheme, host and mount point of the request (``flask.request.url_root``):
    the link shown is the full address, so it can be pasted anywhere.
    """
    from webapp.services import views

    try:
        view = views.save_view(current_user, int(context["dataset_id"]), query=context["query"], title=title,
                               note=note or "", selection=context.get("selection") or [])
    except InputError as exc:
        return messages.problem(exc), no_update
    address = url_state.absolute_url(url_root, view["url"])
    message = html.Div(
        [
            html.P("Saved. Link to share (anyone signed in sees the same numbers):"),
            html.P(
                [html.A(address, href=address, id=ids.VIEW_SAVE_URL, className="ld-mono"), " ",
                 html.Button("Copy link", id=ids.VIEW_SAVE_COPY, n_clicks=0, type="button",
                             title="Copy the link to the clipboard", className="ld-button ld-button-quiet")],
            ),
        ],
        className="ld-success",
    )
    return message, _listed(int(context["dataset_id"]))


@callback(
    Output(ids.VIEW_SAVE_MESSAGE, "children"),
    Output(ids.VIEWS_LIST, "children"),
    Input(ids.VIEW_SAVE_BUTTON, "n_clicks"),
    State(ids.VIEW_SAVE_CONTEXT, "data"),
    State(ids.VIEW_SAVE_TITLE, "value"),
    State(ids.VIEW_SAVE_NOTE, "value"),
    prevent_initial_call=True,
)
def _on_save(n_clicks, context, title, note):
    if not n_clicks or not context:
        return no_update, no_update
    return save(context, title, note, flask.request.url_root)


# Copy the address: the Clipboard API where the page is a secure context, else a selected
# text field and the copy command; the button then says whether it worked (inside the
# message's status region, so screen readers hear it).
clientside_callback(
    """
    function (clicks, address) {
        if (!clicks || !address) { return window.dash_clientside.no_update; }
        const failed = 'Copy failed: select the address and copy it';
        if (navigator.clipboard && window.isSecureContext) {
            return navigator.clipboard.writeText(address).then(() => 'Copied', () => failed);
        }
        const field = document.createElement('textarea');
        field.value = address;
        field.setAttribute('readonly', '');
        field.style.position = 'fixed';
        field.style.opacity = '0';
        document.body.appendChild(field);
        field.select();
        const copied = document.execCommand('copy');
        field.remove();
        return copied ? 'Copied' : failed;
    }
    """,
    Output(ids.VIEW_SAVE_COPY, "children"),
    Input(ids.VIEW_SAVE_COPY, "n_clicks"),
    State(ids.VIEW_SAVE_URL, "href"),
    prevent_initial_call=True,
)
