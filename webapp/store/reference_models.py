"""Query functions for reference models and their signatures.

Every function takes a Session; the caller commits, inside the review write
lock (``webapp.store.review.lock_review``) for every write.  The database
guards the rows (migration 0003_reference_models): content frozen at
insert, state moves proposed -> approved | rejected and approved -> retired
only with a signature, never signed by the proposer, signatures append-only.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session, undefer

from webapp.store.engine import add_and_flush
from webapp.store.tables import Dataset, ReferenceModel, ReferenceModelSignature

DECISION, RETIREMENT = "decision", "retirement"


# --- reference models ---------------------------------------------------------------------


def insert_reference_model(session: Session, **fields: Any) -> ReferenceModel:
    """Add a proposed reference model (with its frozen content) and flush it."""
    return add_and_flush(session, ReferenceModel(**fields))


def get_reference_model(session: Session, reference_model_id: int, *, with_document: bool = False):
    """The row, or None; ``with_document`` also loads the (large) open model file."""
    query = select(ReferenceModel).where(ReferenceModel.id == reference_model_id)
    if with_document:
        query = query.options(undefer(ReferenceModel.document))
    return session.scalar(query.execution_options(populate_existing=True))


def list_reference_models(
    session: Session, *, states: list[str] | None = None, name: str | None = None,
    projects: set[int] | None = None,
) -> list[ReferenceModel]:
    """Reference models by name, then version (the document is not loaded); only those whose
    training dataset belongs to ``projects`` when given."""
    query = select(ReferenceModel).order_by(ReferenceModel.name, ReferenceModel.version)
    if projects is not None:
        query = query.join(Dataset, Dataset.id == ReferenceModel.dataset_id).where(
            Dataset.project_id.in_(sorted(projects)))
    if states:
        query = query.where(ReferenceModel.state.in_(states))
    if name is not None:
        query = query.where(ReferenceModel.name == name)
    return list(session.scalars(query))


def next_version(session: Session, name: str) -> int:
    """One more than the highest version of ``name`` in any state (1 for a new name)."""
    highest = session.scalar(select(func.max(ReferenceModel.version)).where(ReferenceModel.name == name))
    return int(highest or 0) + 1


def approved_of_name(session: Session, name: str) -> ReferenceModel | None:
    """The approved version of ``name``, if any (the database allows at most one)."""
    return session.scalar(
        select(ReferenceModel).where(ReferenceModel.name == name, ReferenceModel.state == "approved")
    )


def superseded_of(session: Session, reference_model_id: int) -> int | None:
    """The id of the version this one superseded, if any."""
    return session.scalar(select(ReferenceModel.id).where(ReferenceModel.superseded_by == reference_model_id))


def decide(session: Session, reference_model_id: int, state: str, decided_at: datetime) -> bool:
    """proposed -> ``state`` (approved | rejected); False when it was not proposed any more."""
    result = session.execute(
        update(ReferenceModel)
        .where(ReferenceModel.id == reference_model_id, ReferenceModel.state == "proposed")
        .values(state=state, decided_at=decided_at)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1


def retire(
    session: Session, reference_model_id: int, retired_at: datetime, superseded_by: int | None = None
) -> bool:
    """approved -> retired (by a retirement signature or ``superseded_by`` a later version)."""
    result = session.execute(
        update(ReferenceModel)
        .where(ReferenceModel.id == reference_model_id, ReferenceModel.state == "approved")
        .values(state="retired", retired_at=retired_at, superseded_by=superseded_by)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1


# --- signatures ---------------------------------------------------------------------------


def insert_signature(session: Session, **fields: Any) -> ReferenceModelSignature:
    """Add a signature; UNIQUE(reference_model_id, step) refuses a second one of a step."""
    return add_and_flush(session, ReferenceModelSignature(**fields))


def signatures_of(session: Session, reference_model_ids: list[int]) -> dict[int, list[ReferenceModelSignature]]:
    """Each model's signatures in the order they were made."""
    out: dict[int, list[ReferenceModelSignature]] = {i: [] for i in reference_model_ids}
    if not reference_model_ids:
        return out
    rows = session.scalars(
        select(ReferenceModelSignature)
        .where(ReferenceModelSignature.reference_model_id.in_(reference_model_ids))
        .order_by(ReferenceModelSignature.id)
    )
    for row in rows:
        out[row.reference_model_id].append(row)
    return out
