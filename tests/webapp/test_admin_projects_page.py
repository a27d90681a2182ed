"""The projects page of site admins (/admin/projects): its plain functions, as its callbacks call them.

Sources: OWASP Authorization Cheat Sheet (every request checked on the server: a Dash callback
answers any signed-in user, so the functions refuse non-admins themselves).
"""

from __future__ import annotations

import importlib

from flask_login import login_user
from review_helpers import actor

from webapp.auth import CurrentUser


def _user(who) -> CurrentUser:
    return CurrentUser(id=who.id, name=who.name, display_name=who.display_name, role=who.role)


def _text(component) -> str:
    return str(component.to_plotly_json() if hasattr(component, "to_plotly_json") else component)


def test_an_admin_makes_a_project_and_sets_a_member(app, client):
    page = importlib.import_module("webapp.web.pages.admin_projects")
    admin, ana = actor(app, "admin"), actor(app, "analyst")
    with app.test_request_context("/admin/projects"):
        login_user(_user(admin))
        assert "Project Line 9 made" in _text(page.create("Line 9", "invented"))
        assert "exists already" in _text(page.create("Line 9", ""))
        project_id = next(o["value"] for o in page._options()[0] if o["label"] == "Line 9")
        assert "Members of Line 9 updated" in _text(page.set_role(project_id, ana.id, "reviewer"))
        assert f"{ana.name} (reviewer)" in _text(page.projects_table())
        assert "Choose a project" in _text(page.set_role(project_id, None, "viewer"))
    answer = client.get(f"/api/v1/projects/{project_id}", headers=admin.headers).get_json()["project"]
    assert [(m["user_id"], m["role"]) for m in answer["members"]] == [(ana.id, "reviewer")]


def test_the_page_functions_refuse_anyone_but_a_site_admin(app):
    page = importlib.import_module("webapp.web.pages.admin_projects")
    ana = actor(app, "analyst")
    with app.test_request_context("/admin/projects"):
        login_user(_user(ana))
        assert page.ADMIN_ONLY in _text(page.create("Sneaky", ""))
        assert page.ADMIN_ONLY in _text(page.set_role(1, ana.id, "reviewer"))
