"""Accounts for administrators (``/admin``): the users, adding one, changing one, the admin log.

Adding a user gives a one-time password (or one the administrator types), shown
once; the user must choose their own at the first sign-in. An account can get
another role, be disabled and re-enabled, be unlocked, or have its password
reset (a new one-time password; the user's sessions end). Each change is one
entry of the admin log, shown below newest first, with the state of its hash
chain. The plain functions (``add_account``, ``change_account``, ...) are what
the callbacks and the tests call; each refuses anyone but an administrator,
since Dash callbacks answer any signed-in user.
"""

from __future__ import annotations

from datetime import datetime

import dash
from dash import Input, Output, State, callback, ctx, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp.store.tables import ROLES
from webapp.web.ui import fields, ids, messages

ADMIN_PATH = "/admin"
dash.register_page(__name__, path=ADMIN_PATH, name="Admin", title="Admin · LatentDesk", nav=True, order=90,
                   min_role="admin")

ROLE_NOTES = {
    "viewer": "viewer: reads",
    "analyst": "analyst: uploads, fits, proposes, saves views",
    "reviewer": "reviewer: analyst rights, signs proposals",
    "admin": "admin: everything, including accounts",
}
ADMIN_ONLY = "only administrators can change accounts"
CHANGES = {
    ids.ADMIN_SET_ROLE: "role",
    ids.ADMIN_DISABLE: "disable",
    ids.ADMIN_ENABLE: "enable",
    ids.ADMIN_UNLOCK: "unlock",
    ids.ADMIN_RESET: "reset",
}


def when(moment: datetime | None, empty: str = "–") -> str:
    return moment.strftime("%Y-%m-%d %H:%M UTC") if moment else empty


def _is_admin() -> bool:
    return current_user.is_authenticated and auth.has_role(current_user.role, "admin")


def _actor():
    from webapp.services import admin_log

    return admin_log.actor_of(current_user)


def state_text(user: dict) -> str:
    state = "active" if user["active"] else "disabled"
    return state + ("; must choose a new password" if user["must_change_password"] else "")


def users_table(users: list[dict]) -> html.Table | html.P:
    """Every account with its role, state, last sign-in, failed sign-ins and any lock (names as text)."""
    if not users:
        return html.P("No accounts.", className="ld-muted")
    header = html.Tr([html.Th("User name"), html.Th("Printed name"), html.Th("Role"), html.Th("State"),
                      html.Th("Last sign-in"), html.Th("Failed sign-ins", className="ld-num"),
                      html.Th("Locked until")])
    rows = [
        html.Tr([
            html.Td(u["name"]), html.Td(u["printed_name"]), html.Td(u["role"]), html.Td(state_text(u)),
            html.Td(when(u["last_sign_in"], "none in 90 days")), html.Td(u["failed_sign_ins"], className="ld-num"),
            html.Td(when(u["locked_until"])),
        ])
        for u in users
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table")


def target_options(users: list[dict]) -> list[dict]:
    return [{"label": f"{u['name']} ({u['role']}, {state_text(u)})", "value": u["id"]} for u in users]


def _users() -> list[dict]:
    from webapp.services import user_admin

    return user_admin.users()


def _one_time(text: str, password: str) -> html.Div:
    """A password shown once, with what to do with it."""
    return html.Div(
        [
            html.P(text),
            html.P(["One-time password: ", html.Code(password, id=ids.ADMIN_ONE_TIME_PASSWORD, className="ld-mono")]),
            html.P("Hand it over now, by a separate way from the user name: it is not shown again and only its "
                   "hash is stored. The user must choose their own password at the next sign-in."),
        ],
        className="ld-success", role="status",
    )


def add_account(name, printed_name, role, password) -> html.Div | html.P:
    """Add a user as the signed-in administrator; the message (with the password, once) or the refusal."""
    from webapp.services import user_admin

    if not _is_admin():
        return messages.problem(InputError(ADMIN_ONLY))
    try:
        made = user_admin.add(_actor(), name, role, printed_name, password or None)
    except InputError as exc:
        return messages.problem(exc)
    user = made["user"]
    text = f"Added {user['name']} ({user['role']}), printed name {user['printed_name']}."
    if password:
        return html.P(f"{text} The password you set must be changed by the user at the first sign-in.",
                      className="ld-success", role="status")
    return _one_time(text, made["password"])


def change_account(change: str, user_id, role=None) -> html.Div | html.P:
    """One change (``role``, ``disable``, ``enable``, ``unlock``, ``reset``) to the account ``user_id``."""
    from webapp.services import user_admin

    if not _is_admin():
        return messages.problem(InputError(ADMIN_ONLY))
    if user_id is None:
        return messages.problem(InputError("choose the account to change first"))
    if change == "role" and role is None:
        return messages.problem(InputError("choose the new role first"))
    actor = _actor()
    try:
        if change == "reset":
            made = user_admin.reset(actor, int(user_id))
            return _one_time(f"The password of {made['user']['name']} was reset and their sessions ended.",
                             made["password"])
        options = {"role": {"role": role}, "disable": {"disabled": True}, "enable": {"disabled": False},
                   "unlock": {"unlock_account": True}}[change]
        user = user_admin.update(actor, int(user_id), **options)
    except user_admin.UserNotFound:
        return messages.problem(InputError(f"there is no account with id {user_id}"))
    except InputError as exc:
        return messages.problem(exc)
    done = {"role": f"now has the role {user['role']}", "disable": "is disabled; their sessions ended and "
            "their API tokens were revoked", "enable": "can sign in again", "unlock": "is unlocked"}[change]
    return html.P(f"{user['name']} {done}.", className="ld-success", role="status")


# --- the admin log ------------------------------------------------------------------------------


def log_table(entries: list[dict]) -> html.Table | html.P:
    if not entries:
        return html.P("No entries yet.", className="ld-muted")
    header = html.Tr([html.Th("#", className="ld-num"), html.Th("UTC"), html.Th("By"), html.Th("What"),
                      html.Th("Hash")])
    rows = [
        html.Tr([
            html.Td(e["seq"], className="ld-num"), html.Td(e["at"][:19].replace("T", " ")),
            html.Td(e["actor_name"]), html.Td(e["summary"]),
            html.Td(e["hash"][:10] + "…", title=e["hash"], className="ld-muted ld-mono"),
        ])
        for e in entries
    ]
    return html.Table([html.Thead(header), html.Tbody(rows)], className="ld-table ld-log-table")


def log_view(number: int) -> tuple:
    """(table, where we are, page number, newer disabled, older disabled) for page ``number``."""
    from webapp.services import admin_log

    page = admin_log.page(number)
    position = f"Page {page['page']} of {page['pages']}, {page['total']} entries, newest first."
    return log_table(page["entries"]), position, page["page"], page["page"] <= 1, page["page"] >= page["pages"]


def verify_banner() -> html.P:
    from webapp.services import admin_log

    state = admin_log.verify()
    if state["intact"]:
        return html.P(f"Admin log verified: the hash chain is {state['reason']}; chain head "
                      f"{str(state['head']['hash'])[:16]}…", title=str(state["head"]["hash"]), className="ld-success")
    return html.P(f"Admin log BROKEN at entry {state['first_broken_seq']}: {state['reason']}", className="ld-alert")


# --- the page -----------------------------------------------------------------------------------


def _add_section() -> html.Section:
    role = dcc.Dropdown(id=ids.ADMIN_ADD_ROLE, options=[{"label": ROLE_NOTES[r], "value": r} for r in ROLES],
                        value="viewer", clearable=False)
    return html.Section(
        [
            html.H2("Add a user"),
            html.Div(
                [
                    *fields.labelled("User name (what they sign in with)",
                                     dcc.Input(id=ids.ADMIN_ADD_NAME, className="ld-input", maxLength=80,
                                               autoComplete="off")),
                    *fields.labelled("Printed name (shown with their signatures)",
                                     dcc.Input(id=ids.ADMIN_ADD_PRINTED, className="ld-input", maxLength=200,
                                               autoComplete="off")),
                    *fields.labelled("Role", role),
                    *fields.labelled("Password (leave empty for a one-time password)",
                                     dcc.Input(id=ids.ADMIN_ADD_PASSWORD, type="password", className="ld-input",
                                               autoComplete="new-password", maxLength=256)),
                    html.Button("Add user", id=ids.ADMIN_ADD_SUBMIT, className="ld-button"),
                ],
                className="ld-form",
            ),
            html.Div(id=ids.ADMIN_ADD_MESSAGE),
        ],
        className="ld-panel",
    )


def _change_section(users: list[dict]) -> html.Section:
    return html.Section(
        [
            html.H2("Change an account"),
            html.Div(
                [
                    *fields.labelled("Account", dcc.Dropdown(id=ids.ADMIN_TARGET, options=target_options(users),
                                                             placeholder="Choose an account")),
                    *fields.labelled("New role", dcc.Dropdown(
                        id=ids.ADMIN_ROLE, options=[{"label": ROLE_NOTES[r], "value": r} for r in ROLES],
                        placeholder="Choose a role")),
                    html.Div(
                        [
                            html.Button("Change role", id=ids.ADMIN_SET_ROLE, className="ld-button"),
                            html.Button("Disable", id=ids.ADMIN_DISABLE, className="ld-button ld-button-quiet"),
                            html.Button("Re-enable", id=ids.ADMIN_ENABLE, className="ld-button ld-button-quiet"),
                            html.Button("Unlock", id=ids.ADMIN_UNLOCK, className="ld-button ld-button-quiet"),
                            html.Button("Reset password", id=ids.ADMIN_RESET,
                                        className="ld-button ld-button-quiet"),
                        ],
                        className="ld-button-row",
                    ),
                ],
                className="ld-form",
            ),
            html.P("The last active administrator cannot be disabled or given another role. Disabling ends the "
                   "user's sessions and revokes their API tokens; a reset ends their sessions and they choose a "
                   "new password at the next sign-in.", className="ld-muted"),
            html.Div(id=ids.ADMIN_CHANGE_MESSAGE),
        ],
        className="ld-panel",
    )


def layout(**_query) -> html.Div:
    users = _users()
    table, position, number, newer_off, older_off = log_view(1)
    return html.Div(
        [
            html.H1("Accounts"),
            html.P(dcc.Link("Projects and their members", href="/admin/projects")),
            html.Section(
                [html.H2("Users"),
                 html.P("Last sign-in: the newest browser sign-in of the last 90 days (sessions are kept that long).",
                        className="ld-muted"),
                 html.Div(users_table(users), id=ids.ADMIN_USERS)],
                className="ld-panel",
            ),
            _add_section(),
            _change_section(users),
            html.Section(
                [
                    html.H2("Admin log"),
                    html.Div(verify_banner(), id=ids.ADMIN_LOG_VERIFY),
                    html.P(["Every change to an account, by whom and when (UTC). Entries cannot be changed or "
                            "deleted; ", html.Code("latentdesk log verify"), " checks the chain."],
                           className="ld-muted"),
                    dcc.Store(id=ids.ADMIN_LOG_PAGE, data=number),
                    html.Div(table, id=ids.ADMIN_LOG_TABLE),
                    html.Div(
                        [
                            html.Button("Newer entries", id=ids.ADMIN_LOG_NEWER, disabled=newer_off,
                                        className="ld-button ld-button-quiet"),
                            html.Span(position, id=ids.ADMIN_LOG_POSITION, role="status"),
                            html.Button("Older entries", id=ids.ADMIN_LOG_OLDER, disabled=older_off,
                                        className="ld-button ld-button-quiet"),
                        ],
                        className="ld-button-row",
                    ),
                ],
                className="ld-panel",
            ),
        ]
    )


def after_change() -> tuple:
    """What every change refreshes: the users table, the account choices, the log (first page)."""
    users = _users()
    table, position, number, newer_off, older_off = log_view(1)
    return (users_table(users), target_options(users), verify_banner(), table, position, number, newer_off,
            older_off)


@callback(
    Output(ids.ADMIN_ADD_MESSAGE, "children"),
    Output(ids.ADMIN_CHANGE_MESSAGE, "children"),
    Output(ids.ADMIN_ADD_PASSWORD, "value"),
    Output(ids.ADMIN_USERS, "children"),
    Output(ids.ADMIN_TARGET, "options"),
    Output(ids.ADMIN_LOG_VERIFY, "children"),
    Output(ids.ADMIN_LOG_TABLE, "children"),
    Output(ids.ADMIN_LOG_POSITION, "children"),
    Output(ids.ADMIN_LOG_PAGE, "data"),
    Output(ids.ADMIN_LOG_NEWER, "disabled"),
    Output(ids.ADMIN_LOG_OLDER, "disabled"),
    Input(ids.ADMIN_ADD_SUBMIT, "n_clicks"),
    *[Input(button, "n_clicks") for button in CHANGES],
    State(ids.ADMIN_ADD_NAME, "value"),
    State(ids.ADMIN_ADD_PRINTED, "value"),
    State(ids.ADMIN_ADD_ROLE, "value"),
    State(ids.ADMIN_ADD_PASSWORD, "value"),
    State(ids.ADMIN_TARGET, "value"),
    State(ids.ADMIN_ROLE, "value"),
    prevent_initial_call=True,
)
def _on_change(_add, *args):
    name, printed, add_role, password, target, role = args[len(CHANGES):]
    if ctx.triggered_id == ids.ADMIN_ADD_SUBMIT:
        added, changed, cleared = add_account(name, printed, add_role, password), no_update, ""
    elif ctx.triggered_id in CHANGES:
        added, changed, cleared = no_update, change_account(CHANGES[ctx.triggered_id], target, role), no_update
    else:
        return (no_update,) * 11
    if not _is_admin():
        return (added, changed, cleared) + (no_update,) * 8
    return (added, changed, cleared, *after_change())


@callback(
    Output(ids.ADMIN_LOG_TABLE, "children", allow_duplicate=True),
    Output(ids.ADMIN_LOG_POSITION, "children", allow_duplicate=True),
    Output(ids.ADMIN_LOG_PAGE, "data", allow_duplicate=True),
    Output(ids.ADMIN_LOG_NEWER, "disabled", allow_duplicate=True),
    Output(ids.ADMIN_LOG_OLDER, "disabled", allow_duplicate=True),
    Input(ids.ADMIN_LOG_NEWER, "n_clicks"),
    Input(ids.ADMIN_LOG_OLDER, "n_clicks"),
    State(ids.ADMIN_LOG_PAGE, "data"),
    prevent_initial_call=True,
)
def _on_page(_newer, _older, number):
    if not _is_admin():
        return (no_update,) * 5
    step = -1 if ctx.triggered_id == ids.ADMIN_LOG_NEWER else 1
    return log_view(int(number or 1) + step)
