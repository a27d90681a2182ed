"""Query functions for projects, their members, and which project a stored thing belongs to.

A dataset names its project; its models, reference models, batches, exclusion
proposals and saved views belong to that project through it. Every function
takes a Session; the caller commits.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from webapp.store.engine import add_and_flush
from webapp.store.tables import (
    Batch,
    Dataset,
    ExclusionProposal,
    Model,
    Project,
    ProjectMember,
    ReferenceModel,
    SavedView,
)


def add_project(session: Session, name: str, description: str, created_by: int | None) -> Project:
    return add_and_flush(session, Project(name=name, description=description, created_by=created_by))


def get_project(session: Session, project_id: int) -> Project | None:
    return session.get(Project, project_id)


def project_named(session: Session, name: str) -> Project | None:
    return session.scalar(select(Project).where(Project.name == name))


def list_projects(session: Session, ids: set[int] | None = None) -> list[Project]:
    """Projects by name; only ``ids`` when given."""
    query = select(Project).order_by(Project.name)
    if ids is not None:
        query = query.where(Project.id.in_(sorted(ids)))
    return list(session.scalars(query))


def sole_project(session: Session) -> Project | None:
    """The site's project when it has exactly one, else None."""
    rows = list(session.scalars(select(Project).order_by(Project.id).limit(2)))
    return rows[0] if len(rows) == 1 else None


def add_missing_members(session: Session, project_id: int, users: list) -> list:
    """Make every one of ``users`` (users rows) that belongs to no project yet a member of the
    project in their site role (site admins need no membership); returns those added."""
    members = set(session.scalars(select(ProjectMember.user_id).distinct()))
    added = [u for u in users if u.id not in members and u.role != "admin"]
    for user in added:
        session.add(ProjectMember(project_id=project_id, user_id=user.id, role=user.role))
    session.flush()
    return added


def memberships(session: Session, user_id: int) -> dict[int, str]:
    """project id -> the user's role there."""
    return dict(session.execute(
        select(ProjectMember.project_id, ProjectMember.role).where(ProjectMember.user_id == user_id)
    ).all())


def members_of(session: Session, project_id: int) -> list[ProjectMember]:
    return list(session.scalars(select(ProjectMember).where(ProjectMember.project_id == project_id)
                                .order_by(ProjectMember.user_id)))


def set_member(session: Session, project_id: int, user_id: int, role: str | None) -> str | None:
    """Give ``user_id`` ``role`` in the project (None: remove them); returns the role they had."""
    row = session.get(ProjectMember, (project_id, user_id))
    before = row.role if row is not None else None
    if role is None:
        if row is not None:
            session.delete(row)
    elif row is None:
        session.add(ProjectMember(project_id=project_id, user_id=user_id, role=role))
    else:
        row.role = role
    session.flush()
    return before


# --- which project a thing belongs to ------------------------------------------------------

def project_of(session: Session, kind: str, key: Any) -> int | None:
    """The project of a dataset, model, reference model, batch, proposal or saved view (by its
    id, or token for a view); None when there is no such thing (or it has no project)."""
    query = {
        "dataset": select(Dataset.project_id).where(Dataset.id == key),
        "model": select(Dataset.project_id).join(Model, Model.dataset_id == Dataset.id).where(Model.id == key),
        "reference_model": select(Dataset.project_id).join(ReferenceModel, ReferenceModel.dataset_id == Dataset.id)
        .where(ReferenceModel.id == key),
        "batch": select(Dataset.project_id).join(ReferenceModel, ReferenceModel.dataset_id == Dataset.id)
        .join(Batch, Batch.reference_model_id == ReferenceModel.id).where(Batch.id == key),
        "proposal": select(Dataset.project_id).join(ExclusionProposal, ExclusionProposal.dataset_id == Dataset.id)
        .where(ExclusionProposal.id == key),
        "view": select(Dataset.project_id).join(SavedView, SavedView.dataset_id == Dataset.id)
        .where(SavedView.id == key),
    }[kind]
    return session.scalar(query)
