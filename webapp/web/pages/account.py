"""My account (``/account``), for everyone signed in: password, sessions, API tokens.

Changing the password asks for the current one, ends every other session and
is written to the admin log. The sessions are the user's live browser
sign-ins; any of them, or all but this one, can be ended. An API token gets a
name, an expiry and a scope (read-only: GET and HEAD only); it is shown once.
The plain functions (``change_password``, ``create_token``, ...) are what the
callbacks and the tests call, always for the signed-in user.
"""

from __future__ import annotations

from datetime import datetime

import dash
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp.auth import passwords
from webapp.web.ui import fields, ids, messages

ACCOUNT_PATH = "/account"
dash.register_page(__name__, path=ACCOUNT_PATH, name="My account", title="My account · LatentDesk", nav=True,
                   order=95)

DEFAULT_TOKEN_DAYS = 90
READ_ONLY_OPTION = "read-only"


def when(moment: datetime | None, empty: str = "–") -> str:
    return moment.strftime("%Y-%m-%d %H:%M UTC") if moment else empty


# --- password -----------------------------------------------------------------------------------


def change_password(old_password, new_password, repeat_password) -> html.P:
    """Change the signed-in user's password; the message or the refusal."""
    from webapp.services import my_account

    if (new_password or "") != (repeat_password or ""):
        return messages.problem(InputError("the two new passwords differ; nothing was changed"))
    try:
        ended = my_account.change_password(current_user, old_password or "", new_password or "")
    except InputError as exc:
        return messages.problem(exc)
    return html.P(f"Your password is changed. {ended} other session(s) ended; this one stays signed in.",
                  className="ld-success", role="status")


# --- sessions -----------------------------------------------------------------------------------


def sessions_table(listed: list[dict]) -> html.Table | html.P:
    if not listed:
        return html.P("No live browser session.", className="ld-muted")
    header = html.Tr([html.Th("Signed in"), html.Th("Last used"), html.Th("Browser"), html.Th("Address"),
                      html.Th("This one")])
    rows = [
        html.Tr([html.Td(when(s["created_at"])), html.Td(when(s["last_seen_at"])), html.Td(s["user_agent"] or "–"),
                 html.Td(s["address"] or "–"), html.Td("yes" if s["current"] else "")])
        for s in listed
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def session_options(listed: list[dict]) -> list[dict]:
    return [{"label": f"signed in {when(s['created_at'])}, {s['address'] or 'unknown address'}"
                      + (" (this one)" if s["current"] else ""), "value": s["id"]}
            for s in listed]


def _sessions() -> list[dict]:
    from webapp.services import my_account

    return my_account.list_sessions(current_user)


def end_sessions(which: str, session_id=None) -> html.P:
    """End one session (``which="one"``) or every other one (``"others"``) of the signed-in user."""
    from webapp.services import my_account

    if which == "others":
        ended = my_account.revoke_other_sessions(current_user)
        return html.P(f"{ended} other session(s) ended.", className="ld-success", role="status")
    if session_id is None:
        return messages.problem(InputError("choose the session to end first"))
    try:
        my_account.revoke_session(current_user, int(session_id))
    except my_account.SessionNotFound:
        return messages.problem(InputError("that session has ended already"))
    return html.P("The session ended.", className="ld-success", role="status")


# --- API tokens ---------------------------------------------------------------------------------


def tokens_table(tokens: list[dict]) -> html.Table | html.P:
    if not tokens:
        return html.P("No API tokens.", className="ld-muted")
    header = html.Tr([html.Th("Id", className="ld-num"), html.Th("Name"), html.Th("Scope"), html.Th("Created"),
                      html.Th("Expires"), html.Th("Last used"), html.Th("State")])
    rows = [
        html.Tr([html.Td(t["id"], className="ld-num"), html.Td(t["name"]), html.Td(t["scope"]),
                 html.Td(when(t["created_at"])), html.Td(when(t["expires_at"], "never")),
                 html.Td(when(t["last_used_at"])), html.Td(t["state"])])
        for t in tokens
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def token_options(tokens: list[dict]) -> list[dict]:
    return [{"label": f"{t['id']}: {t['name']} ({t['scope']})", "value": t["id"]}
            for t in tokens if t["state"] == "live"]


def _tokens() -> list[dict]:
    from webapp.services import my_account

    return my_account.list_tokens(current_user)


def create_token(name, days, scope: list | None) -> html.Div | html.P:
    """A new token of the signed-in user's own, shown once; or the refusal."""
    from webapp.services import my_account

    try:
        made = my_account.create_token(current_user, name, days, READ_ONLY_OPTION in (scope or []))
    except InputError as exc:
        return messages.problem(exc)
    return html.Div(
        [
            html.P(f"Token {made['id']} ({made['name']}, {made['scope']}, expires "
                   f"{when(made['expires_at'], 'never')}):"),
            html.P(html.Code(made["token"], id=ids.ACCOUNT_NEW_TOKEN, className="ld-mono")),
            html.P("Copy it now: it is not shown again and only its hash is stored. Send it as "
                   "Authorization: Bearer TOKEN."),
        ],
        className="ld-success", role="status",
    )


def revoke_token(token_id) -> html.P:
    from webapp.services import my_account, user_admin

    if token_id is None:
        return messages.problem(InputError("choose the token to revoke first"))
    try:
        my_account.revoke_token(current_user, int(token_id))
    except user_admin.TokenNotFound:
        return messages.problem(InputError("that token is revoked already"))
    return html.P(f"Token {token_id} is revoked.", className="ld-success", role="status")


# --- the page -----------------------------------------------------------------------------------


def _password_section() -> html.Section:
    return html.Section(
        [
            html.H2("Change your password"),
            html.Div(
                [
                    *fields.labelled("Current password", dcc.Input(
                        id=ids.ACCOUNT_OLD_PASSWORD, type="password", autoComplete="current-password",
                        className="ld-input")),
                    *fields.labelled("New password", dcc.Input(
                        id=ids.ACCOUNT_NEW_PASSWORD, type="password", autoComplete="new-password",
                        className="ld-input", maxLength=passwords.MAX_LENGTH)),
                    *fields.labelled("New password again", dcc.Input(
                        id=ids.ACCOUNT_REPEAT_PASSWORD, type="password", autoComplete="new-password",
                        className="ld-input", maxLength=passwords.MAX_LENGTH)),
                    html.P(f"At least {passwords.MIN_LENGTH} characters; a phrase of a few words is easy to "
                           "remember. Commonly used passwords, repeated or consecutive characters and your user "
                           "name are refused. Your other sessions end.", className="ld-muted"),
                    html.Button("Change password", id=ids.ACCOUNT_PASSWORD_SUBMIT, className="ld-button"),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.ACCOUNT_PASSWORD_MESSAGE),
        ],
        className="ld-panel",
    )


def _sessions_section(listed: list[dict]) -> html.Section:
    return html.Section(
        [
            html.H2("Your sessions"),
            html.Div(sessions_table(listed), id=ids.ACCOUNT_SESSIONS),
            html.Div(
                [
                    *fields.labelled("Session", dcc.Dropdown(id=ids.ACCOUNT_SESSION_CHOICE,
                                                             options=session_options(listed),
                                                             placeholder="Choose a session")),
                    html.Div(
                        [html.Button("End the session", id=ids.ACCOUNT_SESSION_END,
                                     className="ld-button ld-button-quiet"),
                         html.Button("End every other session", id=ids.ACCOUNT_SESSIONS_END_OTHERS,
                                     className="ld-button ld-button-quiet")],
                        className="ld-button-row",
                    ),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.ACCOUNT_SESSION_MESSAGE),
        ],
        className="ld-panel",
    )


def _tokens_section(tokens: list[dict]) -> html.Section:
    return html.Section(
        [
            html.H2("API tokens"),
            html.P("A token lets a script use the JSON API as you, with your role; a read-only one may only read.",
                   className="ld-muted"),
            html.Div(
                [
                    *fields.labelled("Name (what the token is for)", dcc.Input(
                        id=ids.ACCOUNT_TOKEN_NAME, className="ld-input", maxLength=200, autoComplete="off")),
                    *fields.labelled("Expires after (days; empty: never)", dcc.Input(
                        id=ids.ACCOUNT_TOKEN_DAYS, type="number", min=1, max=3650, step=1,
                        value=DEFAULT_TOKEN_DAYS, className="ld-input")),
                    *fields.labelled("Scope", dcc.Checklist(
                        id=ids.ACCOUNT_TOKEN_READ_ONLY, value=[READ_ONLY_OPTION],
                        options=[{"label": " Read-only (GET and HEAD only)", "value": READ_ONLY_OPTION}])),
                    html.Button("Create token", id=ids.ACCOUNT_TOKEN_SUBMIT, className="ld-button"),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.ACCOUNT_TOKEN_MESSAGE),
            html.Div(tokens_table(tokens), id=ids.ACCOUNT_TOKENS),
            html.Div(
                [
                    *fields.labelled("Token", dcc.Dropdown(id=ids.ACCOUNT_TOKEN_CHOICE, options=token_options(tokens),
                                                           placeholder="Choose a live token")),
                    html.Button("Revoke token", id=ids.ACCOUNT_TOKEN_REVOKE, className="ld-button ld-button-quiet"),
                ],
                className="ld-form",
            ),
        ],
        className="ld-panel",
    )


def layout(**_query) -> html.Div:
    listed, tokens = _sessions(), _tokens()
    return html.Div(
        [
            html.H1("My account"),
            html.P(f"Signed in as {current_user.name} ({current_user.role}); printed name "
                   f"{current_user.display_name}. An administrator changes roles and printed names.",
                   className="ld-muted"),
            _password_section(),
            _sessions_section(listed),
            _tokens_section(tokens),
        ]
    )


@callback(
    Output(ids.ACCOUNT_PASSWORD_MESSAGE, "children"),
    Output(ids.ACCOUNT_OLD_PASSWORD, "value"),
    Output(ids.ACCOUNT_NEW_PASSWORD, "value"),
    Output(ids.ACCOUNT_REPEAT_PASSWORD, "value"),
    Output(ids.ACCOUNT_SESSIONS, "children", allow_duplicate=True),
    Output(ids.ACCOUNT_SESSION_CHOICE, "options", allow_duplicate=True),
    Input(ids.ACCOUNT_PASSWORD_SUBMIT, "n_clicks"),
    State(ids.ACCOUNT_OLD_PASSWORD, "value"),
    State(ids.ACCOUNT_NEW_PASSWORD, "value"),
    State(ids.ACCOUNT_REPEAT_PASSWORD, "value"),
    prevent_initial_call=True,
)
def _on_password(n_clicks, old, new, repeat):
    if not n_clicks:
        return (no_update,) * 6
    message = change_password(old, new, repeat)
    listed = _sessions()
    return message, "", "", "", sessions_table(listed), session_options(listed)


@callback(
    Output(ids.ACCOUNT_SESSION_MESSAGE, "children"),
    Output(ids.ACCOUNT_SESSIONS, "children"),
    Output(ids.ACCOUNT_SESSION_CHOICE, "options"),
    Output(ids.ACCOUNT_SESSION_CHOICE, "value"),
    Input(ids.ACCOUNT_SESSION_END, "n_clicks"),
    Input(ids.ACCOUNT_SESSIONS_END_OTHERS, "n_clicks"),
    State(ids.ACCOUNT_SESSION_CHOICE, "value"),
    prevent_initial_call=True,
)
def _on_sessions(_one, _others, session_id):
    which = "others" if ctx.triggered_id == ids.ACCOUNT_SESSIONS_END_OTHERS else "one"
    message = end_sessions(which, session_id)
    listed = _sessions()
    return message, sessions_table(listed), session_options(listed), None


@callback(
    Output(ids.ACCOUNT_TOKEN_MESSAGE, "children"),
    Output(ids.ACCOUNT_TOKENS, "children"),
    Output(ids.ACCOUNT_TOKEN_CHOICE, "options"),
    Output(ids.ACCOUNT_TOKEN_CHOICE, "value"),
    Input(ids.ACCOUNT_TOKEN_SUBMIT, "n_clicks"),
    Input(ids.ACCOUNT_TOKEN_REVOKE, "n_clicks"),
    State(ids.ACCOUNT_TOKEN_NAME, "value"),
    State(ids.ACCOUNT_TOKEN_DAYS, "value"),
    State(ids.ACCOUNT_TOKEN_READ_ONLY, "value"),
    State(ids.ACCOUNT_TOKEN_CHOICE, "value"),
    prevent_initial_call=True,
)
def _on_tokens(_create, _revoke, name, days, scope, token_id):
    if ctx.triggered_id == ids.ACCOUNT_TOKEN_REVOKE:
        message = revoke_token(token_id)
    else:
        message = create_token(name, int(days) if isinstance(days, float) and days.is_integer() else days, scope)
    tokens = _tokens()
    return message, tokens_table(tokens), token_options(tokens), None
