"""The dataset page's link "Make this model a reference model" (``/monitoring?model=<id>``).

The dataset page places ``reference_model_link()`` beside its review links; the
callback points it at the fitted model on screen (the FIT_RESULT store) and
shows it to analysts once a fit is there.

Not a page of its own (no page is registered here); Dash's page loader imports
every module in pages/ whose text mentions register_page, which is how the
callback below reaches each app exactly once.
"""

from __future__ import annotations

from dash import Input, Output, callback, dcc
from flask_login import current_user

from webapp import auth
from webapp import url_state
from webapp.web.ui import ids

HIDDEN = {"display": "none"}


def reference_model_link() -> dcc.Link:
    return dcc.Link("Make this model a reference model", id=ids.MON_REFERENCE_LINK, href=url_state.monitoring_url(),
                    className="ld-link", style=HIDDEN)


def link_for(fit_result: dict | None, can_act: bool) -> tuple[str, dict | None]:
    """(href, style): the proposal form for the fitted model on screen, hidden without one or the role."""
    if not can_act or not fit_result or not fit_result.get("ok") or fit_result.get("id") is None:
        return url_state.monitoring_url(), HIDDEN
    return url_state.monitoring_url(fit_result["id"]), None


@callback(
    Output(ids.MON_REFERENCE_LINK, "href"),
    Output(ids.MON_REFERENCE_LINK, "style"),
    Input(ids.FIT_RESULT, "data"),
)
def _update_link(fit_result):
    can_act = current_user.is_authenticated and auth.has_role(current_user.role, "analyst")
    return link_for(fit_result, can_act)
