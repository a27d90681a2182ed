"""Queries for users, API tokens and login attempts."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import delete, func, select, update
from sqlalchemy.orm import Session

from webapp.store.tables import ApiToken, LoginAttempt, User
from webapp.store.types import utcnow


# -- users -----------------------------------------------------------------

def add_user(
    session: Session, name: str, role: str, password_hash: str, display_name: str | None = None
) -> User:
    user = User(
        name=name,
        role=role,
        password_hash=password_hash,
        display_name=display_name or name,
        active=True,
        failed_logins=0,
    )
    session.add(user)
    session.flush()
    return user


def get_user(session: Session, user_id: int) -> User | None:
    return session.get(User, user_id)


def get_user_by_name(session: Session, name: str) -> User | None:
    return session.scalars(select(User).where(User.name == name)).first()


def list_users(session: Session) -> list[User]:
    return list(session.scalars(select(User).order_by(User.name)))


def set_password(session: Session, user: User, password_hash: str) -> None:
    user.password_hash = password_hash
    user.failed_logins = 0
    user.locked_until = None


def set_active(session: Session, user: User, active: bool) -> None:
    user.active = active


# -- lockout ---------------------------------------------------------------

def record_login_attempt(session: Session, name: str, client_addr: str, ok: bool) -> None:
    session.add(LoginAttempt(name=name[:200], client_addr=client_addr[:64], ok=ok, at=utcnow()))


def prune_login_attempts(session: Session, before: datetime) -> int:
    """Forget sign-in attempts older than ``before``; returns how many."""
    return session.execute(delete(LoginAttempt).where(LoginAttempt.at < before)).rowcount


def failed_attempts_from(session: Session, client_addr: str, since: datetime) -> int:
    """Failed sign-ins from one client address since ``since``."""
    return session.scalar(
        select(func.count(LoginAttempt.id)).where(
            LoginAttempt.client_addr == client_addr,
            LoginAttempt.ok.is_(False),
            LoginAttempt.at >= since,
        )
    )


def last_success_from(session: Session, client_addr: str) -> datetime | None:
    return session.scalar(
        select(func.max(LoginAttempt.at)).where(
            LoginAttempt.client_addr == client_addr, LoginAttempt.ok.is_(True)
        )
    )


def count_failed_login(session: Session, user_id: int) -> int:
    """Atomically add one failed sign-in to a user; returns the new count."""
    session.execute(
        update(User).where(User.id == user_id).values(failed_logins=User.failed_logins + 1)
    )
    return session.scalar(select(User.failed_logins).where(User.id == user_id))


def lock_user(session: Session, user_id: int, until: datetime) -> None:
    session.execute(
        update(User).where(User.id == user_id).values(locked_until=until, failed_logins=0)
    )


def clear_failed_logins(session: Session, user_id: int) -> None:
    session.execute(
        update(User).where(User.id == user_id).values(failed_logins=0, locked_until=None)
    )


# -- API tokens ------------------------------------------------------------

def add_token(session: Session, user_id: int, token_hash: str, label: str = "") -> ApiToken:
    token = ApiToken(user_id=user_id, token_hash=token_hash, label=label, created_at=utcnow())
    session.add(token)
    session.flush()
    return token


def find_token(session: Session, token_hash: str) -> ApiToken | None:
    return session.scalars(select(ApiToken).where(ApiToken.token_hash == token_hash)).first()


def list_tokens(session: Session, user_id: int | None = None) -> list[ApiToken]:
    query = select(ApiToken).order_by(ApiToken.id)
    if user_id is not None:
        query = query.where(ApiToken.user_id == user_id)
    return list(session.scalars(query))


def revoke_tokens(session: Session, user_id: int, token_id: int | None = None) -> int:
    """Revoke a user's live tokens (or one of them); returns how many were revoked."""
    query = (
        update(ApiToken)
        .where(ApiToken.user_id == user_id, ApiToken.revoked_at.is_(None))
        .values(revoked_at=utcnow())
    )
    if token_id is not None:
        query = query.where(ApiToken.id == token_id)
    return session.execute(query).rowcount


def touch_token(session: Session, token_id: int) -> None:
    session.execute(update(ApiToken).where(ApiToken.id == token_id).values(last_used_at=utcnow()))
