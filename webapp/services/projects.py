"""Projects: a team's datasets (and everything made from them) and its members with their roles.

Site admins create projects and set members (viewer, analyst or reviewer);
every change enters the admin log. Which project a request is about, and the
role a user has there, is decided at the door (``webapp.auth.projects``); the
lists here take the project ids a user may see.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.exc import IntegrityError

from analysis.errors import InputError
from webapp.services import admin_log, audit
from webapp.services.context import session_scope
from webapp.services.review_rules import conflict, forbidden
from webapp.store import accounts
from webapp.store import projects as store
from webapp.store.ids import check_id
from webapp.store.tables import PROJECT_ROLES

MAX_NAME_CHARS, MAX_DESCRIPTION_CHARS = 200, 2000
FIRST_PROJECT = "First project"  # the project of a site's first dataset (as migration 0011 names it)


class ProjectNotFound(LookupError):
    """No such project, or one the user does not belong to (404 either way)."""


def _project_dict(row, members: list | None = None, names: dict[int, str] | None = None) -> dict[str, Any]:
    answer = {"id": row.id, "name": row.name, "description": row.description,
              "created_at": audit.utc_iso(row.created_at), "created_by": row.created_by}
    if members is not None:
        answer["members"] = [{"user_id": m.user_id, "name": (names or {}).get(m.user_id), "role": m.role}
                             for m in members]
    return answer


def list_projects(visible: set[int] | None) -> list[dict[str, Any]]:
    """The projects in ``visible`` (None: every project), by name."""
    with session_scope() as session:
        return [_project_dict(row) for row in store.list_projects(session, visible)]


def project_info(project_id, visible: set[int] | None) -> dict[str, Any]:
    """One project with its members; ProjectNotFound unless it exists and is in ``visible``."""
    with session_scope() as session:
        row = store.get_project(session, project_id) if isinstance(project_id, int) else None
        if row is None or (visible is not None and row.id not in visible):
            raise ProjectNotFound(project_id)
        members = store.members_of(session, row.id)
        names = {u.id: u.name for u in accounts.list_users(session)}
        return _project_dict(row, members, names)


def _check_name(name) -> str:
    if not isinstance(name, str) or not name.strip():
        raise InputError("name is required: the project's name (1-200 characters)", field="name")
    name = " ".join(name.split())
    if len(name) > MAX_NAME_CHARS:
        raise InputError(f"name is longer than {MAX_NAME_CHARS} characters", field="name")
    return name


def create_project(name, description, user) -> dict[str, Any]:
    """A new project (site admins); a name already taken is a 409."""
    if user.role != "admin":
        raise forbidden("only site admins create projects")
    name = _check_name(name)
    if not isinstance(description, str) or len(description) > MAX_DESCRIPTION_CHARS:
        raise InputError(f"description must be text of at most {MAX_DESCRIPTION_CHARS} characters",
                         field="description")

    def work(session):
        if store.project_named(session, name) is not None:
            raise conflict(f"a project named {name!r} exists already")
        sole = store.sole_project(session)
        if sole is not None:  # from now on membership counts: nobody loses the first project
            for member in store.add_missing_members(session, sole.id, accounts.list_users(session)):
                admin_log.record(session, admin_log.actor_of(user), "project_member_set", member,
                                 project={"id": sole.id, "name": sole.name}, old_role=None, new_role=member.role,
                                 reason="a second project was created")
        row = store.add_project(session, name, description.strip(), user.id)
        admin_log.record(session, admin_log.actor_of(user), "project_created", project={"id": row.id, "name": name})
        return _project_dict(row, [], {})

    return admin_log.write(work)


def set_member(project_id, user_id, role, user) -> dict[str, Any]:
    """Give ``user_id`` ``role`` in the project, or remove them (``role`` None); site admins only."""
    if user.role != "admin":
        raise forbidden("only site admins manage project members")
    target_id = check_id(user_id, "user_id")
    if role is not None and role not in PROJECT_ROLES:
        raise InputError(f"role must be one of {', '.join(PROJECT_ROLES)} (or null to remove the member), "
                         f"got {str(role)[:40]!r}", field="role")

    def work(session):
        project = store.get_project(session, project_id) if isinstance(project_id, int) else None
        if project is None:
            raise ProjectNotFound(project_id)
        target = accounts.get_user(session, target_id)
        if target is None:
            raise InputError(f"user_id {target_id}: no user with that id", field="user_id")
        before = store.set_member(session, project.id, target.id, role)
        admin_log.record(session, admin_log.actor_of(user), "project_member_set", target,
                         project={"id": project.id, "name": project.name}, old_role=before, new_role=role)
        members = store.members_of(session, project.id)
        return _project_dict(project, members, {u.id: u.name for u in accounts.list_users(session)})

    return admin_log.write(work)


def project_for_upload(project_id, user_id: int) -> int:
    """The project a new dataset goes into: ``project_id`` when given (the caller checked the
    user's role there), else the site's only project (made as "First project" with the site's
    first dataset), else the only project the user belongs to; InputError naming project_id."""
    if project_id is not None:
        return check_id(project_id, "project_id")
    for _attempt in range(2):  # two first uploads at once: one makes the project, the other reads it
        with session_scope() as session:
            every = store.list_projects(session)  # one read, so the answer is consistent
            if len(every) == 1:
                return every[0].id
            if every:
                mine = store.memberships(session, user_id)
                if len(mine) == 1:
                    return next(iter(mine))
                break
            try:
                with session.begin_nested():
                    return store.add_project(session, FIRST_PROJECT, "The site's first project.", None).id
            except IntegrityError:
                continue
    raise InputError("project_id is required: say which of your projects the dataset belongs to",
                     field="project_id")
