"""One saved view, opened from its link: ``/views/<view_id>``, and its banner on the dataset page.

Refits (or reads from the cache) the model with the saved settings and
exclusions and shows whether its fingerprint equals the saved one: equal
fingerprints mean the same numbers.  "Open on the dataset page" leads to the
full dataset page showing that model; when the dataset's approved exclusions
changed since the view was saved, the current state is one more link, labelled
with what differs.  On the dataset page, the banner (``dataset_banner``) says
whether the model on screen is the saved one and, if not, what differs, with a
link to the other version.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html
from flask_login import current_user

from analysis.errors import InputError
from webapp import url_state
from webapp.web.pages.review import when
from webapp.web.ui import ids, messages

dash.register_page(__name__, path_template="/views/<view_id>", name="Saved view", title="Saved view · LatentDesk")


def _pct(values) -> str:
    return ", ".join(f"PC{i + 1} {100 * v:.1f}%" for i, v in enumerate(values))


def opened_view(opened: dict) -> html.Div:
    view, model = opened["view"], opened["model"]
    proof = (
        html.P(f"Same model as saved: fingerprint {opened['fingerprint_now'][:16]}… matches.", className="ld-success",
               title=opened["fingerprint_now"])
        if opened["reproduced"]
        else html.P(
            f"The model no longer matches the saved fingerprint ({opened['fingerprint_saved'][:16]}… saved, "
            f"{opened['fingerprint_now'][:16]}… now): the software version or the data reading changed.",
            className="ld-alert",
        )
    )
    change = None
    if opened["change"]:
        change = html.Div(
            [
                html.P(f"{opened['change']} The numbers below are as saved; the current state is a different "
                       "model.", className="ld-alert"),
                html.P(dcc.Link("Open the current state (a different model)", href=opened["links"]["current"])),
            ]
        )
    return html.Div(
        [
            html.H1(view["title"]),
            html.P(view["note"]) if view["note"] else None,
            html.P(f"Saved by {view['created_by_name']} at {when(view['created_at'])}.", className="ld-muted"),
            proof,
            change,
            html.Section(
                [
                    html.P(f"{model['n_samples']} samples, {model['n_components']} component(s): "
                           f"{_pct(model['explained_variance_ratio'])}."),
                    html.P(f"Left out of the fit: {', '.join(opened['excluded_as_saved']) or 'none'}."),
                    html.P(f"Selected: {', '.join(view['state'].get('selection') or []) or 'nothing'}.",
                           className="ld-muted"),
                    dcc.Link("Open on the dataset page", href=opened["links"]["as_saved"], className="ld-button"),
                ],
                className="ld-panel",
            ),
        ],
        id=ids.VIEW_OPEN,
    )


def layout(view_id=None, **_query) -> html.Div:
    from webapp.services import views

    try:
        opened = views.open_view(str(view_id), user_id=current_user.id)
    except views.ViewNotFound:
        return html.Div([html.H1("Saved view"), html.P("There is no saved view at this link.", className="ld-alert")])
    except InputError as exc:
        return html.Div([html.H1("Saved view"), messages.problem(exc)])
    return opened_view(opened)


# ------------------------------------------------ the banner on the dataset page
def dataset_banner(comparison: dict | None):
    """Children of the dataset page's banner for ``views.compare_with_view`` (None: no view)."""
    if not comparison:
        return None
    view, links = comparison["view"], comparison["links"]
    title = f"Saved view \u201c{view['title']}\u201d by {view['created_by_name'] or 'someone'}"
    if comparison["same"] and not comparison["differences"]:
        current = comparison["current_change"]
        return html.Div(
            [html.P(f"{title}: the model as saved (same fingerprint, so the same numbers).", className="ld-success"),
             html.P([f"{current} ", dcc.Link("Open the current state (a different model)", href=links["current"])])
             if current else html.P("The approved exclusions are the same as when it was saved.",
                                    className="ld-muted")],
            className="ld-view-banner",
        )
    return html.Div(
        [html.P(f"{title}: {'same model, but' if comparison['same'] else 'not the model saved in it.'}",
                className="ld-alert"),
         html.Ul([html.Li(d) for d in comparison["differences"]]),
         html.P(dcc.Link("Back to the view as saved", href=links["as_saved"]))],
        className="ld-view-banner",
    )


def banner_for(search: str | None, dataset_id, result: dict | None, user):
    """The banner of a dataset page whose address names a saved view (``view=<id>``)."""
    from webapp.services import views

    view_id = url_state.view_id_from_query(search)
    if view_id is None or not result or not result.get("ok"):
        return None
    try:
        return dataset_banner(views.compare_with_view(view_id, int(dataset_id), user, result))
    except (views.ViewNotFound, InputError):
        return None  # the page's notes already say why the view was not used (dataset.initial_selection)


@callback(
    Output(ids.VIEW_BANNER, "children"),
    Input(ids.FIT_RESULT, "data"),
    State(ids.DATASET_LOCATION, "search"),
    State(ids.DATASET_ID, "data"),
)
def _banner(result, search, dataset_id):
    return banner_for(search, dataset_id, result, current_user)
