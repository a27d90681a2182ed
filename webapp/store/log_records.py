"""Read-only queries for the cross-check of records against the review log.

Every record the review log vouches for, read whole and in insertion order:
exclusion proposals and their sign-offs, reference models (without their model
file) and their signatures, batches and their outcomes.  The caller
(``webapp.services.record_audit``) compares them with the log entries.
"""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from webapp.store.tables import (
    Batch,
    BatchOutcome,
    BatchSample,
    ExclusionProposal,
    ReferenceModel,
    ReferenceModelSignature,
    ReviewLogEntry,
    SignOff,
)


def log_entries_of(session: Session, actions: tuple[str, ...]) -> list[ReviewLogEntry]:
    """The log entries with one of ``actions``, in ``seq`` order."""
    query = select(ReviewLogEntry).where(ReviewLogEntry.action.in_(actions)).order_by(ReviewLogEntry.seq)
    return list(session.scalars(query))


def proposals(session: Session) -> list[ExclusionProposal]:
    return list(session.scalars(select(ExclusionProposal).order_by(ExclusionProposal.id)))


def sign_offs(session: Session) -> list[SignOff]:
    return list(session.scalars(select(SignOff).order_by(SignOff.id)))


def reference_models(session: Session) -> list[ReferenceModel]:
    """Every reference model; the model file (``document``) stays unread (deferred column)."""
    return list(session.scalars(select(ReferenceModel).order_by(ReferenceModel.id)))


def reference_model_signatures(session: Session) -> list[ReferenceModelSignature]:
    return list(session.scalars(select(ReferenceModelSignature).order_by(ReferenceModelSignature.id)))


def batches(session: Session) -> list[Batch]:
    return list(session.scalars(select(Batch).order_by(Batch.id)))


def batch_outcomes(session: Session) -> list[tuple[BatchOutcome, int, str]]:
    """``(outcome, batch_id, sample_id)`` for every batch outcome, oldest first (None, None: no such sample)."""
    rows = session.execute(
        select(BatchOutcome, BatchSample.batch_id, BatchSample.sample_id)
        .outerjoin(BatchSample, BatchSample.id == BatchOutcome.batch_sample_id)
        .order_by(BatchOutcome.id)
    )
    return [(outcome, batch_id, sample_id) for outcome, batch_id, sample_id in rows]
