"""Query functions for the review workflow: proposals, sign-offs, the review log, saved views.

Every function takes a Session; the caller commits.  The review log is only ever
inserted into here (database triggers refuse UPDATE and DELETE, migration
0002_review_guards).  ``lock_review`` serialises review writes across processes:
PostgreSQL ``SELECT ... FOR UPDATE`` on the one-row chain head, SQLite
``BEGIN IMMEDIATE`` (the write lock taken at the start of the transaction).
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Iterator

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from webapp.store import chain_logs
from webapp.store.chain_logs import REVIEW_LOG
from webapp.store.engine import add_and_flush
from webapp.store.tables import (
    Dataset,
    ExclusionProposal,
    ReviewLogEntry,
    ReviewLogHead,
    SavedView,
    SignOff,
    User,
)


# --- locking, the chain head and the stored chain (``webapp.store.chain_logs``) -------------


def lock_review(session: Session) -> None:
    """Take the review write lock for the rest of this transaction.

    Call first in every transaction that writes proposals, sign-offs or log
    entries, before reading what the write depends on.
    """
    chain_logs.lock(session, REVIEW_LOG)


def chain_head(session: Session) -> ReviewLogHead | None:
    return chain_logs.chain_head(session, REVIEW_LOG)


def move_chain_head(session: Session, old_seq: int, new_seq: int, new_hash: str) -> bool:
    """Move the head from ``old_seq`` to the new entry; False if someone moved it meanwhile."""
    return chain_logs.move_chain_head(session, REVIEW_LOG, old_seq, new_seq, new_hash)


# --- the review log -----------------------------------------------------------------------


def insert_log_entry(session: Session, **fields: Any) -> ReviewLogEntry:
    return chain_logs.insert_entry(session, REVIEW_LOG, **fields)


def iter_log(session: Session, batch: int = 1000) -> Iterator[ReviewLogEntry]:
    """Every log entry in ``seq`` order, fetched in batches (the log can be long)."""
    return chain_logs.iter_entries(session, REVIEW_LOG, batch)


def log_entries(
    session: Session,
    *,
    dataset_id: int | None = None,
    actions: list[str] | None = None,
    actor_id: int | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    limit: int | None = None,
) -> list[ReviewLogEntry]:
    """Log entries, oldest first, filtered by dataset, action, person and time."""
    query = select(ReviewLogEntry).order_by(ReviewLogEntry.seq)
    if dataset_id is not None:
        query = query.where(ReviewLogEntry.dataset_id == dataset_id)
    if actions:
        query = query.where(ReviewLogEntry.action.in_(actions))
    if actor_id is not None:
        query = query.where(ReviewLogEntry.actor_id == actor_id)
    if since is not None:
        query = query.where(ReviewLogEntry.at >= since)
    if until is not None:
        query = query.where(ReviewLogEntry.at < until)
    if limit is not None:
        query = query.limit(limit)
    return list(session.scalars(query))


def log_actors(session: Session, dataset_id: int) -> list[tuple[int | None, str]]:
    """The (actor_id, actor_name) pairs that appear in a dataset's log."""
    rows = session.execute(
        select(ReviewLogEntry.actor_id, ReviewLogEntry.actor_name)
        .where(ReviewLogEntry.dataset_id == dataset_id)
        .distinct()
        .order_by(ReviewLogEntry.actor_name)
    )
    return [(a, n) for a, n in rows]


def count_log(session: Session) -> int:
    return chain_logs.count_entries(session, REVIEW_LOG)


def log_entry_at(session: Session, seq: int) -> ReviewLogEntry | None:
    """The log entry with sequence number ``seq``, or None when there is none."""
    return chain_logs.entry_at(session, REVIEW_LOG, seq)


# --- proposals and sign-offs --------------------------------------------------------------


def insert_proposal(session: Session, **fields: Any) -> ExclusionProposal:
    return add_and_flush(session, ExclusionProposal(**fields))


def get_proposal(session: Session, proposal_id: int) -> ExclusionProposal | None:
    return session.get(ExclusionProposal, proposal_id, populate_existing=True)


def list_proposals(
    session: Session, *, dataset_id: int | None = None, states: list[str] | None = None
) -> list[ExclusionProposal]:
    """Proposals, oldest first."""
    query = select(ExclusionProposal).order_by(ExclusionProposal.id)
    if dataset_id is not None:
        query = query.where(ExclusionProposal.dataset_id == dataset_id)
    if states:
        query = query.where(ExclusionProposal.state.in_(states))
    return list(session.scalars(query))


def close_proposal(session: Session, proposal_id: int, state: str, decided_at: datetime) -> bool:
    """Move a proposal out of ``proposed``; False when it was not ``proposed`` any more.

    The ``WHERE state = 'proposed'`` makes this the single winner of a race:
    a second writer, once the first commits, updates no row.
    """
    result = session.execute(
        update(ExclusionProposal)
        .where(ExclusionProposal.id == proposal_id, ExclusionProposal.state == "proposed")
        .values(state=state, decided_at=decided_at)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1


def insert_sign_off(session: Session, **fields: Any) -> SignOff:
    """Add a sign-off; the UNIQUE(proposal_id) constraint refuses a second one."""
    return add_and_flush(session, SignOff(**fields))


def sign_off_of(session: Session, proposal_id: int) -> SignOff | None:
    return session.scalar(select(SignOff).where(SignOff.proposal_id == proposal_id))


def sign_offs_for(session: Session, proposal_ids: list[int]) -> dict[int, SignOff]:
    if not proposal_ids:
        return {}
    rows = session.scalars(select(SignOff).where(SignOff.proposal_id.in_(proposal_ids)))
    return {row.proposal_id: row for row in rows}


def approved_in_order(session: Session, dataset_id: int) -> list[tuple[str, list[str]]]:
    """(action, samples) of the dataset's approved proposals in the order they were signed."""
    rows = session.execute(
        select(ExclusionProposal.action, ExclusionProposal.samples)
        .join(SignOff, SignOff.proposal_id == ExclusionProposal.id)
        .where(ExclusionProposal.dataset_id == dataset_id, ExclusionProposal.state == "approved")
        .order_by(SignOff.id)
    )
    return [(action, list(samples)) for action, samples in rows]


# --- users and datasets the review needs --------------------------------------------------


def get_user(session: Session, user_id: int) -> User | None:
    return session.get(User, user_id)


def display_names(session: Session, user_ids) -> dict[int, str]:
    ids = {i for i in user_ids if i is not None}
    if not ids:
        return {}
    return dict(session.execute(select(User.id, User.display_name).where(User.id.in_(ids))).all())


def get_dataset(session: Session, dataset_id: int) -> Dataset | None:
    return session.get(Dataset, dataset_id)


# --- saved views --------------------------------------------------------------------------


def insert_view(session: Session, **fields: Any) -> SavedView:
    return add_and_flush(session, SavedView(**fields))


def get_view(session: Session, view_id: str) -> SavedView | None:
    return session.get(SavedView, view_id)


def list_views(session: Session, dataset_id: int | None = None) -> list[SavedView]:
    """Saved views, newest first (all datasets when ``dataset_id`` is None)."""
    query = select(SavedView).order_by(SavedView.created_at.desc(), SavedView.id)
    if dataset_id is not None:
        query = query.where(SavedView.dataset_id == dataset_id)
    return list(session.scalars(query))
