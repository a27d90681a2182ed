"""Projects at the door: which project a request is about, and the user's role in it.

A user sees only the projects they belong to, and their role in a request about a
project is their role there (site admins are admins everywhere and need no
membership). The project is read off the request itself:

- the route's ids (``dataset_id``, ``model_id``, ``reference_model_id``,
  ``batch_id``, ``proposal_id``, ``view_id``) and a page's query keys
  (``dataset``, ``proposal``, ``model``);
- ids in a JSON body (``dataset_id``, ``model_id``, ``project_id``); an upload's
  form field ``project_id`` is checked by its route with ``acting_user``;
- for Dash callbacks, the page's address (``_pages_location``) and the context
  stores and controls the web layer names at start-up (``init_app``).

Something in a project the user does not belong to answers exactly as something
that does not exist: 404, never a 403 that would confirm it exists (OWASP
Authorization Cheat Sheet: deny by default, avoid revealing resources). A request
about two projects takes the lower of the two roles. Without a project (lists,
the upload page) the user's site role applies; lists show only their projects
(``visible_projects``).
"""

from __future__ import annotations

import dataclasses
import json
from typing import Any, Iterable, Mapping
from urllib.parse import parse_qs

from flask import Flask, g, request
from flask_login import current_user

from webapp.auth import ROLE_RANK, denial, matches_path_template
from webapp.store import session_scope
from webapp.store import projects as store
from webapp.store.ids import is_id, parse_id

ROUTE_KINDS = {"dataset_id": "dataset", "model_id": "model", "reference_model_id": "reference_model",
               "batch_id": "batch", "proposal_id": "proposal", "view_id": "view", "project_id": "project"}
QUERY_KINDS = {"dataset": "dataset", "proposal": "proposal", "model": "model"}
BODY_KINDS = {"dataset_id": "dataset", "model_id": "model", "project_id": "project"}
DASH_CALLBACK_PATH = "/_dash-update-component"
HIDDEN = "There is no such item, or it belongs to a project you are not a member of."


def project_roles(session, user) -> dict[int, str]:
    """project id -> ``user``'s role there (site admins: see ``visible_projects``).

    A site with one project works as one without projects: every user works in it with
    their site role unless a membership says otherwise. Once a second project exists,
    users reach only the projects they are members of (creating the second project makes
    everyone who belonged to none a member of the first, so nobody loses access).
    """
    roles = store.memberships(session, user.id)
    sole = store.sole_project(session)
    if sole is not None and sole.id not in roles:
        roles[sole.id] = user.role
    return roles


def visible_projects(user) -> set[int] | None:
    """The ids of the projects ``user`` may see; None for a site admin (every project)."""
    if user.role == "admin":
        return None
    with session_scope() as session:
        return set(project_roles(session, user))


def projects_with_roles(user) -> list[tuple[int, str, str]]:
    """(id, name, the user's role) of every project ``user`` may see, by name."""
    with session_scope() as session:
        roles = {p.id: "admin" for p in store.list_projects(session)} if user.role == "admin" else \
            project_roles(session, user)
        return [(p.id, p.name, roles[p.id]) for p in store.list_projects(session, set(roles))]


class ProjectHidden(LookupError):
    """No such project, or the user is not a member (answered as 404)."""


def acting_user(user, project_id):
    """``user`` with their role in ``project_id`` (site admins keep admin); ProjectHidden when
    there is no such project or they are not a member."""
    with session_scope() as session:
        exists = is_id(project_id) and store.get_project(session, project_id) is not None
        role = project_roles(session, user).get(project_id) if exists else None
    if not exists or (role is None and user.role != "admin"):
        raise ProjectHidden(project_id)
    return user if user.role == "admin" else dataclasses.replace(user, role=role)


# --- reading the request --------------------------------------------------------------------


def _route_refs(view_args: Mapping[str, Any] | None) -> list[tuple[str, Any]]:
    return [(ROUTE_KINDS[k], v) for k, v in (view_args or {}).items() if k in ROUTE_KINDS]


def _query_refs(query: Mapping[str, list[str]]) -> list[tuple[str, Any]]:
    return [(kind, parse_id(values[0])) for key, kind in QUERY_KINDS.items() if (values := query.get(key))]


def _path_refs(path: str, templates: Iterable[str]) -> list[tuple[str, Any]]:
    """Ids from a page address, by the page templates (``/datasets/<dataset_id>``)."""
    for template in templates:
        if matches_path_template(template, path):
            found = []
            for part, value in zip(template.strip("/").split("/"), path.strip("/").split("/")):
                name = part[1:-1] if part.startswith("<") and part.endswith(">") else ""
                if name in ROUTE_KINDS:
                    found.append((ROUTE_KINDS[name], value if name == "view_id" else parse_id(value)))
            return found
    return []


def _body_refs() -> list[tuple[str, Any]]:
    body = request.get_json(silent=True) if request.is_json else None
    # A multipart upload's project_id is checked by its route (``acting_user``): reading the form
    # here would parse the upload before the route sets its size limit.
    return [(kind, body.get(key)) for key, kind in BODY_KINDS.items() if isinstance(body, dict) and key in body]


def _dash_refs(payload: Any, context_ids: Mapping[str, str], templates: Iterable[str]) -> list[tuple[str, Any]]:
    """Ids a Dash callback is about: its page's address and the named stores and controls."""
    if not isinstance(payload, dict):
        return []
    found: list[tuple[str, Any]] = []
    for item in [*(payload.get("inputs") or []), *(payload.get("state") or [])]:
        for entry in item if isinstance(item, list) else [item]:
            if not isinstance(entry, dict):
                continue
            component, value = entry.get("id"), entry.get("value")
            if component == "_pages_location" and entry.get("property") == "pathname" and isinstance(value, str):
                found += _path_refs(value, templates)
            elif component == "_pages_location" and entry.get("property") == "search" and isinstance(value, str):
                found += _query_refs(parse_qs(value.lstrip("?")))
            elif isinstance(component, str) and component in context_ids:
                found.append((context_ids[component], value))
            if isinstance(value, dict):  # a page's context store: {"dataset_id": 3, ...}
                found += [(ROUTE_KINDS[k], v) for k, v in value.items() if k in ROUTE_KINDS and k != "view_id"]
    return found


def _project_ids(refs: list[tuple[str, Any]]) -> tuple[set[int], bool]:
    """(projects the refs belong to, whether some ref names a project that does not exist)."""
    found: set[int] = set()
    missing_project = False
    with session_scope() as session:
        for kind, key in refs:
            if kind == "view":
                project = store.project_of(session, "view", key) if isinstance(key, str) else None
            elif isinstance(key, float) and key.is_integer():
                project = store.project_of(session, kind, int(key)) if kind != "project" else int(key)
            elif not is_id(key):
                continue  # not an id at all: the route or service answers that
            elif kind == "project":
                project = key if store.get_project(session, key) is not None else None
                missing_project |= project is None
            else:
                project = store.project_of(session, kind, key)
            if project is not None:
                found.add(project)
    return found, missing_project


def request_projects(context_ids: Mapping[str, str], templates: Iterable[str]) -> tuple[set[int], bool]:
    """The projects this request is about (see the module docstring)."""
    refs = _route_refs(request.view_args) + _query_refs(request.args.to_dict(flat=False)) + _body_refs()
    if request.method == "GET":  # a page's address (Dash serves every page under a catch-all route)
        refs += _path_refs(request.path, templates)
    if request.path == DASH_CALLBACK_PATH and request.method == "POST":
        refs += _dash_refs(request.get_json(silent=True), context_ids, templates)
    return _project_ids(refs)


# --- the door -------------------------------------------------------------------------------


def init_app(app: Flask, *, context_ids: Mapping[str, str], templates: Iterable[str]) -> None:
    """Install the project check (``before_request``, after the sign-in check).

    ``context_ids``: Dash component id -> kind ("dataset", "model", "project") of the
    value it holds; ``templates``: the page path templates.
    """
    templates = tuple(templates)

    def check_project():
        if not current_user.is_authenticated:
            return None
        try:
            projects, missing = request_projects(context_ids, templates)
        except (json.JSONDecodeError, UnicodeDecodeError):
            return None  # an unreadable body is refused by the JSON checks
        if missing and current_user.role != "admin":
            return denial(404, HIDDEN)
        if not projects or current_user.role == "admin":
            g.project_ids = projects
            return None
        with session_scope() as session:
            roles = project_roles(session, current_user)
        if any(p not in roles for p in projects):
            return denial(404, HIDDEN)
        lowest = min((roles[p] for p in projects), key=ROLE_RANK.__getitem__)
        g.project_ids = projects
        # The user's role for this request is their role in its project (flask-login keeps the
        # request's user in g._login_user; CurrentUser is a frozen copy, so a new one is made).
        g._login_user = dataclasses.replace(current_user._get_current_object(), role=lowest)
        return None

    app.before_request(check_project)
