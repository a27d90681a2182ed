"""Projects for site admins (``/admin/projects``): every project with its members, a new
project, and a user's role in a project (viewer, analyst, reviewer, or removed).

Each change enters the admin log (``webapp.services.projects``). The plain
functions are what the callbacks and the tests call; each refuses anyone but a
site admin, since Dash callbacks answer any signed-in user.
"""

from __future__ import annotations

import dash
from dash import Input, Output, State, callback, dcc, html, no_update
from flask_login import current_user

from analysis.errors import InputError
from webapp import auth
from webapp.store.tables import PROJECT_ROLES
from webapp.web.ui import fields, ids

dash.register_page(__name__, path="/admin/projects", name="Projects", title="Projects · LatentDesk", order=91,
                   min_role="admin")

REMOVE = "remove"
ADMIN_ONLY = "only site admins manage projects"


def _refused() -> html.P | None:
    if current_user.is_authenticated and auth.has_role(current_user.role, "admin"):
        return None
    return html.P(ADMIN_ONLY, className="ld-alert", role="alert")


def projects_table() -> html.Table | html.P:
    """Every project with its members and their roles."""
    from webapp.services import projects

    found = [projects.project_info(p["id"], None) for p in projects.list_projects(None)]
    if not found:
        return html.P("No project yet: the first dataset makes one.", className="ld-muted")
    rows = [html.Tr([html.Td(p["name"]), html.Td(p["description"] or "–"),
                     html.Td(", ".join(f"{m['name']} ({m['role']})" for m in p["members"]) or "none yet")])
            for p in found]
    return html.Table([html.Thead(html.Tr([html.Th("Project"), html.Th("Description"), html.Th("Members")])),
                       html.Tbody(rows)], className="ld-table")


def _options() -> tuple[list[dict], list[dict]]:
    from webapp.services import projects, user_admin
    from webapp.services.context import session_scope

    with session_scope() as session:
        users = user_admin.list_users(session)
    return ([{"label": p["name"], "value": p["id"]} for p in projects.list_projects(None)],
            [{"label": f"{u['name']} ({u['role']})", "value": u["id"]} for u in users if u["role"] != "admin"])


def create(name, description) -> html.P:
    """Make a project for the signed-in site admin; the message to show."""
    from webapp.services import projects

    refused = _refused()
    if refused is not None:
        return refused
    try:
        made = projects.create_project(name, description or "", current_user)
    except InputError as exc:  # ReviewRefused (409 for a taken name) is an InputError too
        return html.P(str(exc), className="ld-alert", role="alert")
    return html.P(f"Project {made['name']} made; give it members below.", className="ld-success", role="status")


def set_role(project_id, user_id, role) -> html.P:
    """Give a user a role in a project, or remove them; the message to show."""
    from webapp.services import projects

    refused = _refused()
    if refused is not None:
        return refused
    if project_id is None or user_id is None or role is None:
        return html.P("Choose a project, a user and a role.", className="ld-alert", role="alert")
    try:
        changed = projects.set_member(int(project_id), int(user_id), None if role == REMOVE else role, current_user)
    except (InputError, LookupError) as exc:
        return html.P(str(exc) or "no such project", className="ld-alert", role="alert")
    return html.P(f"Members of {changed['name']} updated.", className="ld-success", role="status")


def layout(**_query) -> html.Div:
    project_options, user_options = _options()
    roles = [{"label": r, "value": r} for r in PROJECT_ROLES] + [{"label": "remove from the project", "value": REMOVE}]
    return html.Div(
        [
            html.H1("Projects"),
            html.P(["A user sees only the projects they belong to, with their role there; a site with one project "
                    "works as one without. ", dcc.Link("Accounts", href="/admin")], className="ld-muted"),
            html.Section([html.H2("Every project"), html.Div(projects_table(), id=ids.PROJECTS_TABLE)],
                         className="ld-panel"),
            html.Section(
                [
                    html.H2("New project"),
                    html.Div([
                        *fields.labelled("Name", dcc.Input(id=ids.PROJECT_NEW_NAME, className="ld-input", maxLength=200)),
                        *fields.labelled("Description", dcc.Input(id=ids.PROJECT_NEW_DESCRIPTION, className="ld-input",
                                                                  maxLength=2000)),
                        html.Button("Make project", id=ids.PROJECT_NEW_SUBMIT, className="ld-button"),
                    ], className="ld-form"),
                    html.Div(id=ids.PROJECT_NEW_MESSAGE),
                ],
                className="ld-panel",
            ),
            html.Section(
                [
                    html.H2("Members"),
                    html.Div([
                        *fields.labelled("Project", dcc.Dropdown(id=ids.PROJECT_MEMBER_PROJECT, options=project_options)),
                        *fields.labelled("User", dcc.Dropdown(id=ids.PROJECT_MEMBER_USER, options=user_options)),
                        *fields.labelled("Role in the project", dcc.Dropdown(id=ids.PROJECT_MEMBER_ROLE, options=roles)),
                        html.Button("Set", id=ids.PROJECT_MEMBER_SUBMIT, className="ld-button"),
                    ], className="ld-form"),
                    html.Div(id=ids.PROJECT_MEMBER_MESSAGE),
                ],
                className="ld-panel",
            ),
        ]
    )


@callback(
    Output(ids.PROJECT_NEW_MESSAGE, "children"),
    Output(ids.PROJECTS_TABLE, "children"),
    Output(ids.PROJECT_MEMBER_PROJECT, "options"),
    Input(ids.PROJECT_NEW_SUBMIT, "n_clicks"),
    State(ids.PROJECT_NEW_NAME, "value"),
    State(ids.PROJECT_NEW_DESCRIPTION, "value"),
    prevent_initial_call=True,
)
def _on_create(clicks, name, description):
    if not clicks:
        return no_update, no_update, no_update
    message = create(name, description)
    if _refused() is not None:
        return message, no_update, no_update
    return message, projects_table(), _options()[0]


@callback(
    Output(ids.PROJECT_MEMBER_MESSAGE, "children"),
    Output(ids.PROJECTS_TABLE, "children", allow_duplicate=True),
    Input(ids.PROJECT_MEMBER_SUBMIT, "n_clicks"),
    State(ids.PROJECT_MEMBER_PROJECT, "value"),
    State(ids.PROJECT_MEMBER_USER, "value"),
    State(ids.PROJECT_MEMBER_ROLE, "value"),
    prevent_initial_call=True,
)
def _on_member(clicks, project_id, user_id, role):
    if not clicks:
        return no_update, no_update
    message = set_role(project_id, user_id, role)
    return message, (projects_table() if _refused() is None else no_update)
