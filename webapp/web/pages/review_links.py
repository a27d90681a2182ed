"""Review links on the dataset page: propose the selection, save the view, the log, saved views.

The dataset page places ``review_links(dataset_id)`` in its header; the callback
keeps the two state-dependent links in step with the page's URL and selection
(links built by ``webapp.url_state``).

Not a page of its own (no page is registered here); Dash's page loader imports
every module in pages/ whose text mentions register_page, which is how the
callback below reaches each app exactly once.
"""

from __future__ import annotations

from dash import Input, Output, State, callback, dcc, html
from flask_login import current_user

from webapp import auth
from webapp import url_state
from webapp.web.ui import ids

HIDDEN = {"display": "none"}


def review_links(dataset_id: int) -> html.Div:
    can_act = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return html.Div(
        [
            dcc.Link("Propose exclusion of the selection", id=ids.REVIEW_PROPOSE_LINK, href="",
                     className="ld-button ld-button-quiet", style=HIDDEN),
            dcc.Link("Save view", id=ids.VIEW_SAVE_LINK, href=url_state.save_view_url(dataset_id),
                     className="ld-button ld-button-quiet", style=None if can_act else HIDDEN),
            dcc.Link("Review log", href=url_state.review_log_url(dataset_id), className="ld-link"),
            dcc.Link("Saved views", href=url_state.views_url(dataset_id), className="ld-link"),
        ],
        id=ids.REVIEW_LINKS,
        className="ld-review-links",
    )


def links_for(dataset_id: int, search: str | None, selection: dict | None, can_act: bool):
    """(propose href, propose style, save-view href) for the page state and selection."""
    state = url_state.from_query(search or "")
    chosen = (selection or {}).get("sample_ids") or []
    save_href = url_state.save_view_url(dataset_id, state, chosen)
    if not chosen or not can_act:
        return "", HIDDEN, save_href
    # The comparison uses the page's model settings; its own what-if exclusions are not carried over.
    return url_state.propose_url(dataset_id, chosen, state=state.with_changes(exclude=())), None, save_href


@callback(
    Output(ids.REVIEW_PROPOSE_LINK, "href"),
    Output(ids.REVIEW_PROPOSE_LINK, "style"),
    Output(ids.VIEW_SAVE_LINK, "href"),
    Input(ids.DATASET_LOCATION, "search"),
    Input(ids.SELECTION_STORE, "data"),
    State(ids.DATASET_ID, "data"),
)
def _update_links(search, selection, dataset_id):
    can_act = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return links_for(int(dataset_id), search, selection, can_act)
