"""Account administration for the command line: users and API tokens.

Each function opens the configured database (migrating it first), does one
thing through the rules of ``webapp.services.user_admin`` and returns what the
CLI prints. Every change is written to the admin log with the actor
``cli (<OS user>)``. Bad input raises InputError.
"""

from __future__ import annotations

import re
from typing import Any, Mapping

from analysis.errors import InputError
from webapp.config import load_config
from webapp.services import admin_log, user_admin
from webapp.store import accounts, engine_session, make_engine, migrate
from webapp.store.engine import database_url


def _engine(overrides: Mapping[str, Any] | None = None):
    config = load_config(overrides, require_secret=False)
    engine = make_engine(database_url(config))
    migrate(engine)
    return engine


def user_line(name: str, role: str, password: str) -> str:
    """The one line that hands a password over (also used by the demo)."""
    return f"user {name} ({role}) password {password}"


def _admin_write(work, overrides: Mapping[str, Any] | None):
    """``work(session, actor)`` in one admin-log transaction on the configured database, as the CLI."""
    engine = _engine(overrides)
    actor = admin_log.cli_actor()
    try:
        return admin_log.write(lambda session: work(session, actor), engine=engine)
    finally:
        engine.dispose()


def add_user(
    name: str, role: str, password: str | None = None, display_name: str | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> str:
    """Create a user; with no password, a random one is made. Returns the password.

    The person who runs the command hands the password over, so the user need
    not change it at the first sign-in (the first administrator is made this way).
    """
    return _admin_write(
        lambda s, actor: user_admin.add_user(s, actor, name, role, display_name, password, must_change=False)[1],
        overrides,
    )


def list_users(overrides: Mapping[str, Any] | None = None) -> list[dict[str, Any]]:
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            return user_admin.list_users(s)
    finally:
        engine.dispose()


def disable_user(name: str, overrides: Mapping[str, Any] | None = None) -> int:
    """Disable a user (sign-in, browser sessions and tokens stop working); returns tokens revoked."""
    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        if not user.active:
            raise InputError(f"user {name!r} is disabled already")
        live = len([t for t in accounts.list_tokens(s, user.id) if t.revoked_at is None])
        user_admin.set_disabled(s, actor, user, True)
        return live

    return _admin_write(work, overrides)


def enable_user(name: str, overrides: Mapping[str, Any] | None = None) -> None:
    """Let a disabled user sign in again (their revoked tokens stay revoked)."""
    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        if user.active:
            raise InputError(f"user {name!r} is active already")
        user_admin.set_disabled(s, actor, user, False)

    _admin_write(work, overrides)


def set_role(name: str, role: str, overrides: Mapping[str, Any] | None = None) -> str:
    """Give a user another role; returns the role they had."""
    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        old = user.role
        if not user_admin.set_role(s, actor, user, role):
            raise InputError(f"user {name!r} has the role {role} already")
        return old

    return _admin_write(work, overrides)


def reset_password(name: str, overrides: Mapping[str, Any] | None = None) -> str:
    """A one-time password for the user (returned, to print once); they choose their own at the next sign-in."""
    return _admin_write(lambda s, actor: user_admin.reset_password(s, actor, user_admin.user_by_name(s, name)),
                        overrides)


def unlock_user(name: str, overrides: Mapping[str, Any] | None = None) -> int:
    """Clear a user's failed sign-ins and lock; returns how many failures were counted."""
    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        failures = user.failed_logins or 0
        user_admin.unlock(s, actor, user)
        return failures

    return _admin_write(work, overrides)


def create_token(
    name: str, label: str = "", overrides: Mapping[str, Any] | None = None, *,
    expires: str | None = None, read_only: bool = False,
) -> str:
    """A new API token for an active user; printed once, stored hashed.

    ``expires``: a number of days, or a date YYYY-MM-DD (valid through that day, UTC).
    """
    as_days = expires is not None and re.fullmatch(r"[0-9]{1,6}", expires)
    days, date = (int(expires), None) if as_days else (None, expires)
    expires_at = user_admin.token_expiry(days=days, date=date)

    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        return user_admin.create_token(s, actor, user, label or "command line", expires_at=expires_at,
                                       read_only=read_only)[0]

    return _admin_write(work, overrides)


def revoke_tokens(
    name: str, token_id: int | None = None, overrides: Mapping[str, Any] | None = None
) -> int:
    """Revoke a user's tokens (or the one with ``token_id``); returns how many."""
    def work(s, actor):
        user = user_admin.user_by_name(s, name)
        try:
            return user_admin.revoke_tokens(s, actor, user, token_id)
        except user_admin.TokenNotFound:
            raise InputError(f"user {name!r} has no live token with id {token_id}") from None

    return _admin_write(work, overrides)


def list_tokens(name: str | None = None, overrides: Mapping[str, Any] | None = None) -> list[dict]:
    engine = _engine(overrides)
    try:
        with engine_session(engine) as s:
            users = {u.id: u.name for u in accounts.list_users(s)}
            user_id = user_admin.user_by_name(s, name).id if name else None
            return [
                {
                    "id": t.id,
                    "user": users.get(t.user_id, "?"),
                    "label": t.label,
                    "scope": t.scope,
                    "created_at": t.created_at,
                    "expires_at": t.expires_at,
                    "last_used_at": t.last_used_at,
                    "revoked_at": t.revoked_at,
                }
                for t in accounts.list_tokens(s, user_id)
            ]
    finally:
        engine.dispose()
