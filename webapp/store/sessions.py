"""Queries for server-side browser sessions (table ``user_sessions``).

Rows are found by the SHA-256 of the cookie's secret, never by the secret.
A row is revoked once (``revoked_at`` and ``revoked_reason``); the queries that
revoke leave rows that are already revoked as they were.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import delete, select, update
from sqlalchemy.orm import Session

from webapp.store.tables import UserSession

USER_AGENT_CHARS = 200
ADDRESS_CHARS = 64
REASON_CHARS = 64


def add_session(
    session: Session, user_id: int, secret_hash: str, user_agent: str, client_addr: str, now: datetime
) -> UserSession:
    row = UserSession(
        user_id=user_id,
        secret_hash=secret_hash,
        created_at=now,
        last_seen_at=now,
        user_agent=user_agent[:USER_AGENT_CHARS],
        client_addr=client_addr[:ADDRESS_CHARS],
    )
    session.add(row)
    session.flush()
    return row


def find_session(session: Session, secret_hash: str) -> UserSession | None:
    return session.scalars(select(UserSession).where(UserSession.secret_hash == secret_hash)).first()


def touch_session(session: Session, session_id: int, now: datetime) -> None:
    """Record a request on a live session."""
    session.execute(
        update(UserSession)
        .where(UserSession.id == session_id, UserSession.revoked_at.is_(None))
        .values(last_seen_at=now)
    )


def revoke_sessions(
    session: Session,
    user_id: int,
    reason: str,
    now: datetime,
    *,
    session_id: int | None = None,
    keep_session_id: int | None = None,
) -> int:
    """Revoke a user's live sessions (only ``session_id`` when given, all but ``keep_session_id``).

    Returns how many were revoked.
    """
    query = (
        update(UserSession)
        .where(UserSession.user_id == user_id, UserSession.revoked_at.is_(None))
        .values(revoked_at=now, revoked_reason=reason[:REASON_CHARS])
        .execution_options(synchronize_session=False)
    )
    if session_id is not None:
        query = query.where(UserSession.id == session_id)
    if keep_session_id is not None:
        query = query.where(UserSession.id != keep_session_id)
    return session.execute(query).rowcount


def live_sessions(
    session: Session, user_id: int, *, created_since: datetime, seen_since: datetime
) -> list[UserSession]:
    """A user's sessions not revoked, started after ``created_since`` and used after ``seen_since``."""
    return list(
        session.scalars(
            select(UserSession)
            .where(
                UserSession.user_id == user_id,
                UserSession.revoked_at.is_(None),
                UserSession.created_at > created_since,
                UserSession.last_seen_at > seen_since,
            )
            .order_by(UserSession.last_seen_at.desc(), UserSession.id.desc())
        )
    )


def prune_sessions(session: Session, before: datetime) -> int:
    """Forget sessions started before ``before`` (long ended by then); returns how many."""
    return session.execute(delete(UserSession).where(UserSession.created_at < before)).rowcount
