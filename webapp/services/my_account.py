"""What every signed-in user does to their own account: password, sessions, API tokens.

Runs inside a request (the browser's My account page, ``/api/v1/me/...``) for
the signed-in user (``webapp.auth.CurrentUser``).

- A password change needs the current password (a wrong one counts toward the
  lockout, as at sign-in), passes the policy every new password passes, ends
  every other session of the user (the one making the change stays, unless it
  is a token request) and is written to the admin log.
- Sessions: the user's live browser sign-ins, any of which they can end.
- API tokens: named, with an expiry and a scope (read-only: GET and HEAD only);
  shown once and stored as SHA-256; creating and revoking one is written to
  the admin log.

References: Grassi, P.A. et al. (2017) NIST SP 800-63B, section 5.1.1.2
(memorized secrets: length, the blocklist, no composition rules); OWASP
Session Management Cheat Sheet (renew and end sessions after a password
change; let users end their other sessions).
"""

from __future__ import annotations

from typing import Any

from analysis.errors import InputError
from webapp import auth
from webapp.auth import sessions
from webapp.services import admin_log, user_admin
from webapp.services.context import session_scope
from webapp.store import accounts


class SessionNotFound(LookupError):
    """No live session with that id for this user (the API answers 404)."""


def change_password(user, old_password: Any, new_password: Any) -> int:
    """Replace ``user``'s password; returns how many other sessions ended. InputError, nothing
    changed, for a wrong current password or a refused new one."""
    if not isinstance(old_password, str) or not old_password:
        raise InputError("the current password is missing; nothing was changed", field="old_password")
    if not isinstance(new_password, str) or not new_password:
        raise InputError("the new password is missing; nothing was changed", field="new_password")
    if new_password == old_password:
        raise InputError("the new password is the current one; choose another", field="new_password")
    try:
        auth.check_new_password(new_password, user.name)
    except InputError as exc:
        raise InputError(f"{exc}; nothing was changed", field="new_password") from None
    if not auth.check_password_again(user.id, old_password):
        raise InputError("the current password is not correct (or the account is locked); nothing was changed",
                         field="old_password")
    actor = admin_log.actor_of(user)

    def log(session, row, ended: int) -> None:
        admin_log.record(session, actor, "password_changed", row, sessions_ended=ended,
                         forced=bool(user.must_change_password))

    return auth.change_password(user.id, new_password, record=log)


def list_sessions(user) -> list[dict[str, Any]]:
    """The user's live browser sessions, most recently used first (``sessions.list_sessions``)."""
    return sessions.list_sessions(user.id)


def revoke_session(user, session_id: int) -> None:
    """End one of the user's own sessions; SessionNotFound when it names none of theirs."""
    if not sessions.revoke_session(user.id, session_id):
        raise SessionNotFound(session_id)


def list_tokens(user) -> list[dict[str, Any]]:
    """The user's API tokens, oldest first (never their values)."""
    with session_scope() as session:
        return [user_admin.token_dict(token) for token in accounts.list_tokens(session, user.id)]


def create_token(user, name: Any, expires_days: Any = None, read_only: Any = False) -> dict[str, Any]:
    """A new token of the user's own: ``{"token", "id", ...}``; the token is shown only this once."""
    expires_at = user_admin.token_expiry(days=expires_days)
    actor = admin_log.actor_of(user)

    def work(session):
        row = user_admin.user_by_id(session, user.id)
        token, token_id = user_admin.create_token(session, actor, row, name, expires_at=expires_at,
                                                  read_only=read_only)
        listed = user_admin.token_dict(accounts.find_token(session, auth.token_hash(token)))
        return {**listed, "id": token_id, "token": token}

    return admin_log.write(work)


def revoke_token(user, token_id: int) -> None:
    """Revoke one of the user's own live tokens; TokenNotFound otherwise."""
    actor = admin_log.actor_of(user)
    admin_log.write(lambda session: user_admin.revoke_tokens(
        session, actor, user_admin.user_by_id(session, user.id), token_id))


def revoke_other_sessions(user) -> int:
    """End every session of the user but the one of this request; returns how many ended."""
    with session_scope() as session:
        return sessions.revoke_user_sessions(session, user.id, sessions.REVOKED,
                                             keep_session_id=sessions.current_session_id())
