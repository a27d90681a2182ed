"""The frame around every page: top bar (product, navigation, user, sign-out),
the page itself, and the standing caution about statistical flags.

``layout()`` is the Dash app layout; Dash calls it for every page load, so it
shows the user of the current request and the pages their role may open.
"""

from __future__ import annotations

import dash
from dash import dcc, html
from flask import has_request_context
from flask_login import current_user

from webapp import auth
from webapp.web.ui import ids

CAUTION = (
    "Statistical flags support, and never replace, QA judgement and local procedures. "
    "Regulated use needs the site's own validation."
)


def _nav_pages(role: str | None) -> list[dict]:
    """Registered pages that ask to be in the top bar (``nav=True``), in ``order``."""
    pages = [
        page
        for page in dash.page_registry.values()
        if page.get("nav") and (role is not None and auth.has_role(role, page.get("min_role") or "viewer"))
    ]
    return sorted(pages, key=lambda page: (page.get("order") or 0, page["name"]))


def _user_box(user) -> html.Div:
    return html.Div(
        [
            html.Span(user.display_name, className="ld-user-name"),
            html.Span(user.role, className="ld-role-badge"),
            html.Form(
                [
                    dcc.Input(type="hidden", name="csrf_token", value=auth.csrf_token()),
                    html.Button("Sign out", type="submit", className="ld-link-button"),
                ],
                method="POST",
                action=auth.LOGOUT_PATH,
                className="ld-logout",
            ),
        ],
        id=ids.SHELL_USER,
        className="ld-user",
    )


def layout() -> html.Div:
    signed_in = has_request_context() and current_user.is_authenticated
    role = current_user.role if signed_in else None
    links = [
        dcc.Link(page["name"], href=page["relative_path"], className="ld-nav-link")
        for page in _nav_pages(role)
    ]
    return html.Div(
        [
            html.Header(
                [
                    dcc.Link("LatentDesk", href="/", className="ld-brand"),
                    html.Nav(links, id=ids.SHELL_NAV, className="ld-nav"),
                    _user_box(current_user) if signed_in else html.Div(id=ids.SHELL_USER),
                ],
                className="ld-topbar",
            ),
            html.Main(dash.page_container, className="ld-page"),
            html.Footer(CAUTION, className="ld-footer"),
        ],
        className="ld-app",
    )


def _refusal(role: str) -> html.Div:
    return html.Div(
        [html.H1("Not allowed"), html.P(f"This page needs the {role} role.", className="ld-alert")],
        className="ld-refusal",
    )


def guard_page_layouts() -> None:
    """Make every page that declares ``min_role`` check it when Dash builds it.

    The request guard already answers 403 when such a page is opened by URL;
    this covers the page content Dash fetches through its callback route.
    """
    for page in dash.page_registry.values():
        role, layout_fn = page.get("min_role"), page.get("layout")
        if role is None or not callable(layout_fn) or getattr(layout_fn, "min_role", None):
            continue

        def guarded(*args, _layout=layout_fn, _role=role, **kwargs):
            if not (has_request_context() and current_user.is_authenticated
                    and auth.has_role(current_user.role, _role)):
                return _refusal(_role)
            return _layout(*args, **kwargs)

        guarded.min_role = role
        page["layout"] = guarded
