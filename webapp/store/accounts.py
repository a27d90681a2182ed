"""Queries for users, API tokens and login attempts."""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import case, delete, func, literal, or_, select, update
from sqlalchemy.orm import Session

from webapp.store.tables import ApiToken, LoginAttempt, User, UserSession
from webapp.store.types import UTCDateTime, utcnow


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


def set_password(session: Session, user: User, password_hash: str, *, must_change: bool = False) -> None:
    """A new password hash; ``must_change``: the user has to choose their own at next sign-in."""
    user.password_hash = password_hash
    user.failed_logins = 0
    user.locked_until = None
    user.must_change_password = must_change


def set_active(session: Session, user: User, active: bool) -> None:
    user.active = active


def set_role(session: Session, user: User, role: str) -> None:
    user.role = role


def unlock(session: Session, user: User, now: datetime) -> None:
    """Clear the account's failures and lock; failures before ``now`` stop counting for its name."""
    user.failed_logins = 0
    user.locked_until = None
    user.unlocked_at = now


def count_active_admins(session: Session, *, besides: int | None = None) -> int:
    """Active users with the admin role (leaving out the user ``besides``)."""
    query = select(func.count(User.id)).where(User.role == "admin", User.active.is_(True))
    if besides is not None:
        query = query.where(User.id != besides)
    return session.scalar(query) or 0


def last_sign_ins(session: Session) -> dict[int, datetime]:
    """user id -> when their newest browser session began (sessions are kept 90 days)."""
    rows = session.execute(select(UserSession.user_id, func.max(UserSession.created_at)).group_by(UserSession.user_id))
    return dict(rows.all())


# -- lockout ---------------------------------------------------------------

def begin_sign_in_check(session: Session) -> None:
    """Make the rest of this transaction a write transaction from its first statement.

    SQLite: ``BEGIN IMMEDIATE`` takes the database's write lock now, so the counts
    read next and the failure written after them are one step for every worker.
    PostgreSQL needs nothing: ``reserve_password_check`` is one conditional UPDATE,
    which re-checks its condition on the row it waited for (READ COMMITTED).
    """
    connection = session.connection()
    if connection.dialect.name == "sqlite" and not connection.connection.dbapi_connection.in_transaction:
        connection.exec_driver_sql("BEGIN IMMEDIATE")


def record_login_attempt(
    session: Session, name: str, client_addr: str, ok: bool, *, evaluated: bool
) -> int:
    """Store one sign-in attempt (``evaluated``: a password was checked); returns its id."""
    row = LoginAttempt(name=name[:200], client_addr=client_addr[:64], ok=ok, evaluated=evaluated, at=utcnow())
    session.add(row)
    session.flush()
    return row.id


def mark_login_attempt_ok(session: Session, attempt_id: int) -> None:
    """An attempt stored as failed before its password was checked turned out right."""
    session.execute(update(LoginAttempt).where(LoginAttempt.id == attempt_id).values(ok=True))


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


def failed_attempts_for(session: Session, client_addr: str, name: str, since: datetime) -> int:
    """Failed sign-ins from one client address for one user name since ``since`` and since the
    pair's last successful one."""
    pair = (LoginAttempt.client_addr == client_addr, LoginAttempt.name == name[:200])
    last_success = select(func.coalesce(func.max(LoginAttempt.id), 0)).where(*pair, LoginAttempt.ok.is_(True))
    return session.scalar(
        select(func.count(LoginAttempt.id)).where(
            *pair,
            LoginAttempt.ok.is_(False),
            LoginAttempt.at >= since,
            LoginAttempt.id > last_success.scalar_subquery(),
        )
    )


def last_success_from(session: Session, client_addr: str) -> datetime | None:
    return session.scalar(
        select(func.max(LoginAttempt.at)).where(
            LoginAttempt.client_addr == client_addr, LoginAttempt.ok.is_(True)
        )
    )


def reserve_password_check(
    session: Session, user_id: int, *, now: datetime, max_failures: int, lock_until: datetime
) -> bool:
    """Count a failure for ``user_id`` before its password is checked; False while it is locked.

    One conditional UPDATE, atomic on SQLite and PostgreSQL: it counts only when
    the account is not locked (a lock that has run out starts the count again at
    one), and the failure that reaches ``max_failures`` sets the lock in the same
    statement. So however many checks run at once, at most ``max_failures``
    passwords are checked per lock period. A right password then clears the
    count (``clear_failed_logins``).
    """
    count = case((User.locked_until.is_not(None), 1), else_=User.failed_logins + 1)
    result = session.execute(
        update(User)
        .where(User.id == user_id, or_(User.locked_until.is_(None), User.locked_until <= now))
        .values(
            failed_logins=count,
            locked_until=case((count >= max_failures, literal(lock_until, UTCDateTime())), else_=None),
        )
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1


def locked_until(session: Session, user_id: int) -> datetime | None:
    return session.scalar(select(User.locked_until).where(User.id == user_id))


def clear_failed_logins(session: Session, user_id: int) -> None:
    session.execute(
        update(User).where(User.id == user_id).values(failed_logins=0, locked_until=None)
    )


# -- API tokens ------------------------------------------------------------

def add_token(
    session: Session, user_id: int, token_hash: str, label: str = "", *,
    expires_at: datetime | None = None, scope: str = "read-write",
) -> ApiToken:
    token = ApiToken(user_id=user_id, token_hash=token_hash, label=label, created_at=utcnow(),
                     expires_at=expires_at, scope=scope)
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
