"""Projects API (``/api/v1``): list, create, and set members (site admins manage, members read).

Which project a request is about, and the caller's role in it, is decided at the
door (``webapp.auth.projects``); a project the caller does not belong to is a 404.
"""

from __future__ import annotations

from flask import Blueprint

from webapp.api.responses import (
    API_PREFIX,
    json_body,
    json_ok,
    register_common_errors,
    register_not_found,
    requires,
)
from webapp.auth import api_user
from webapp.auth.projects import visible_projects
from webapp.services import projects

bp = Blueprint("api_projects", __name__)
register_common_errors(bp)
register_not_found(bp, projects.ProjectNotFound, "project")


@bp.get(f"{API_PREFIX}/projects")
@requires("viewer")
def list_projects():
    return json_ok(projects=projects.list_projects(visible_projects(api_user())))


@bp.post(f"{API_PREFIX}/projects")
@requires("admin")
def create_project():
    body = json_body({"name", "description"}, required=("name",))
    return json_ok(status=201, project=projects.create_project(body["name"], body.get("description", ""), api_user()))


@bp.get(f"{API_PREFIX}/projects/<id:project_id>")
@requires("viewer")
def get_project(project_id: int):
    return json_ok(project=projects.project_info(project_id, visible_projects(api_user())))


@bp.put(f"{API_PREFIX}/projects/<id:project_id>/members/<id:user_id>")
@requires("admin")
def set_member(project_id: int, user_id: int):
    body = json_body({"role"}, required=("role",))
    return json_ok(project=projects.set_member(project_id, user_id, body["role"], api_user()))
