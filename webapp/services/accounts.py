"""Account administration for the command line: users and API tokens.

Each function opens the configured database (migrating it first), does one
thing and returns what the CLI prints. Bad input raises InputError.
"""

from __future__ import annotations

from typing import Any, Mapping

from analysis.errors import InputError
from webapp import auth
from webapp.auth import sessions
from webapp.config import load_config
from webapp.store import accounts, engine_session, make_engine, migrate
from webapp.store.engine import database_url
from webapp.store.tables import ROLES


def _engine(overrides: Mapping[str, Any] | None = None):
    config = load_config(overrides, require_secret=False)
    engine = make_engine(database_url(config))
    migrate(engine)
    return engine


def user_line(name: str, role: str, password: str) -> str:
    """The one line that hands a password over (also used by the demo)."""
    return f"user {name} ({role}) password {password}"


def _check_name(name: str) -> str:
    name = name.strip()
    if not name or len(name) > 80 or any(ch.isspace() for ch in name):
        raise InputError(f"user name {name!r}: 1 to 80 characters without spaces")
    return name


def _check_role(role: str) -> str:
    if role not in ROLES:
        raise InputError(f"role {role!r}: choose one of {', '.join(ROLES)}")
    return role


def add_user(
    name: str, role: str, password: str | None = None, display_name: str | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> str:
    """Create a user; with no password, a random one is made. Returns the password."""
    name, role = _check_name(name), _check_role(role)
    if password is None:
        password = auth.generate_password()
    auth.check_new_password(password, name)
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            if accounts.get_user_by_name(s, name) is not None:
                raise InputError(f"user {name!r} already exists")
            accounts.add_user(s, name, role, auth.hash_password(password), display_name)
    finally:
        engine.dispose()
    return password


def list_users(overrides: Mapping[str, Any] | None = None) -> list[dict[str, Any]]:
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            return [
                {
                    "name": u.name,
                    "display_name": u.display_name,
                    "role": u.role,
                    "active": u.active,
                    "locked_until": u.locked_until,
                }
                for u in accounts.list_users(s)
            ]
    finally:
        engine.dispose()


def _user_or_error(s, name: str):
    user = accounts.get_user_by_name(s, name)
    if user is None:
        raise InputError(f"no user named {name!r}")
    return user


def disable_user(name: str, overrides: Mapping[str, Any] | None = None) -> int:
    """Disable a user (sign-in, browser sessions and tokens stop working); returns tokens revoked."""
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            user = _user_or_error(s, name)
            accounts.set_active(s, user, False)
            sessions.revoke_user_sessions(s, user.id, sessions.ACCOUNT_DISABLED)
            return accounts.revoke_tokens(s, user.id)
    finally:
        engine.dispose()


def create_token(name: str, label: str = "", overrides: Mapping[str, Any] | None = None) -> str:
    """A new API token for an active user; printed once, stored hashed."""
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            user = _user_or_error(s, name)
            if not user.active:
                raise InputError(f"user {name!r} is disabled")
            return auth.create_token(s, user.id, label)
    finally:
        engine.dispose()


def revoke_tokens(
    name: str, token_id: int | None = None, overrides: Mapping[str, Any] | None = None
) -> int:
    """Revoke a user's tokens (or the one with ``token_id``); returns how many."""
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            user = _user_or_error(s, name)
            count = accounts.revoke_tokens(s, user.id, token_id)
            if token_id is not None and count == 0:
                raise InputError(f"user {name!r} has no live token with id {token_id}")
            return count
    finally:
        engine.dispose()


def list_tokens(name: str | None = None, overrides: Mapping[str, Any] | None = None) -> list[dict]:
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            users = {u.id: u.name for u in accounts.list_users(s)}
            user_id = _user_or_error(s, name).id if name else None
            return [
                {
                    "id": t.id,
                    "user": users.get(t.user_id, "?"),
                    "label": t.label,
                    "created_at": t.created_at,
                    "last_used_at": t.last_used_at,
                    "revoked_at": t.revoked_at,
                }
                for t in accounts.list_tokens(s, user_id)
            ]
    finally:
        engine.dispose()
