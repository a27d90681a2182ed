"""Server-side browser sessions: one database row per sign-in, checked on every request.

The cookie (Flask's signed session) carries a random secret made at sign-in;
the database keeps only its SHA-256 (table ``user_sessions``), with when the
session started and was last used, the browser's user agent (truncated) and
the client address. Because the rows live in the database, a sign-out on one
worker or host holds on every other one at once, and a copy of the cookie
taken before it is refused afterwards.

A session ends (``revoked_at``, ``revoked_reason``):

- at sign-out (``revoke_current``);
- when the password changes: every other session of that user, the one that
  changed it stays (``revoke_user_sessions`` with ``keep_session_id``);
- when the account is disabled (``revoke_user_sessions``);
- after ``LATENTDESK_SESSION_IDLE_MINUTES`` without a request (default 60), and
  ``LATENTDESK_SESSION_HOURS`` after sign-in whatever happens (default 12).

``last_seen_at`` is written at most once a minute (``TOUCH_INTERVAL``), so the
idle timeout holds to within a minute and most requests only read.

References
----------
OWASP Session Management Cheat Sheet: session ID entropy (at least 64 bits),
server-side invalidation at log-out, idle and absolute timeouts.
Grassi, P.A. et al. (2017) NIST SP 800-63B, section 7.1 (session bindings: a
secret from an approved random generator, ended at log-out) and 7.2
(reauthentication after a time without activity).
"""

from __future__ import annotations

import hashlib
import secrets
from datetime import datetime, timedelta

from flask import current_app, g, request
from flask import session as cookie_session

from webapp.store import session_scope, utcnow
from webapp.store import sessions as store

# Where the secret sits in Flask's signed cookie, and flask-login's key for the user id.
SECRET_KEY = "session_secret"
USER_ID_KEY = "_user_id"
SECRET_BYTES = 32  # 256 bits from the OS's random generator (secrets.token_urlsafe)
TOUCH_INTERVAL = timedelta(minutes=1)
# Ended sessions are kept this long for a security review, then deleted at a sign-in.
RETENTION = timedelta(days=90)
# ``g`` attribute caching this request's answer: the live session's id, or None.
_REQUEST_CACHE = "latentdesk_session_id"

SIGNED_OUT = "signed out"
PASSWORD_CHANGED = "password changed"
ACCOUNT_DISABLED = "account disabled"
IDLE = "idle timeout"
LIFETIME = "lifetime over"
REVOKED = "revoked"
REPLACED = "new sign-in in this browser"


def secret_hash(secret: str) -> str:
    """SHA-256 (FIPS 180-4) of a session secret, hex: what the database stores."""
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


def start(user_id: int) -> None:
    """Record a new session for ``user_id`` and put its secret into the cookie (call at sign-in).

    Call after ``flask_login.login_user`` on a cleared Flask session.
    """
    secret = secrets.token_urlsafe(SECRET_BYTES)
    now = utcnow()
    with session_scope() as s:
        row = store.add_session(
            s, user_id, secret_hash(secret), request.headers.get("User-Agent", ""), request.remote_addr or "", now
        )
        store.prune_sessions(s, now - RETENTION)
        session_id = row.id
    cookie_session[SECRET_KEY] = secret
    setattr(g, _REQUEST_CACHE, session_id)


def current_session_id() -> int | None:
    """The id of this request's live session record, or None (checked once per request)."""
    if not hasattr(g, _REQUEST_CACHE):
        setattr(g, _REQUEST_CACHE, _check_cookie())
    return getattr(g, _REQUEST_CACHE)


def current_is_valid() -> bool:
    """Whether the cookie names a live session of the user it is signed in as.

    A session past its idle timeout or lifetime is revoked here, with that reason.
    """
    return current_session_id() is not None


def _ending(row, now: datetime) -> str | None:
    """Why ``row`` has run out by ``now``, or None while it is live."""
    cfg = current_app.config
    if now - row.created_at > timedelta(hours=cfg["SESSION_HOURS"]):
        return LIFETIME
    if now - row.last_seen_at > timedelta(minutes=cfg["SESSION_IDLE_MINUTES"]):
        return IDLE
    return None


def _check_cookie() -> int | None:
    secret, user_id = cookie_session.get(SECRET_KEY), cookie_session.get(USER_ID_KEY)
    if not isinstance(secret, str) or user_id is None:
        return None
    now = utcnow()
    with session_scope() as s:
        row = store.find_session(s, secret_hash(secret))
        if row is None or row.revoked_at is not None or str(row.user_id) != str(user_id):
            return None
        reason = _ending(row, now)
        if reason is not None:
            store.revoke_sessions(s, row.user_id, reason, now, session_id=row.id)
            return None
        if now - row.last_seen_at >= TOUCH_INTERVAL:
            store.touch_session(s, row.id, now)
        return row.id


def revoke_current(reason: str) -> None:
    """End the session this request's cookie names (sign-out) and drop its secret from the cookie."""
    secret = cookie_session.pop(SECRET_KEY, None)
    setattr(g, _REQUEST_CACHE, None)
    if not isinstance(secret, str):
        return
    with session_scope() as s:
        row = store.find_session(s, secret_hash(secret))
        if row is not None:
            store.revoke_sessions(s, row.user_id, reason, utcnow(), session_id=row.id)


def revoke_user_sessions(db_session, user_id: int, reason: str, *, keep_session_id: int | None = None) -> int:
    """End every live session of ``user_id``, except ``keep_session_id``; returns how many ended.

    Runs in the caller's database transaction (``db_session``, from
    ``session_scope()`` or ``engine_session()``; no Flask request needed), so the
    change that calls for it (a new password, a disabled account, a lost role)
    and the revocation commit together. ``reason`` is stored with each row
    (``PASSWORD_CHANGED``, ``ACCOUNT_DISABLED``, ... or a short text, at most
    64 characters). For a user changing their own password pass
    ``keep_session_id=current_session_id()``.
    """
    return store.revoke_sessions(db_session, user_id, reason, utcnow(), keep_session_id=keep_session_id)


def list_sessions(user_id: int) -> list[dict]:
    """The live sessions of ``user_id``, most recently used first.

    Each: ``id``, ``created_at``, ``last_seen_at`` (aware UTC datetimes),
    ``user_agent``, ``address``, ``current`` (the session of this request).
    """
    cfg = current_app.config
    now = utcnow()
    current = current_session_id()
    with session_scope() as s:
        rows = store.live_sessions(
            s,
            user_id,
            created_since=now - timedelta(hours=cfg["SESSION_HOURS"]),
            seen_since=now - timedelta(minutes=cfg["SESSION_IDLE_MINUTES"]),
        )
        return [
            {
                "id": row.id,
                "created_at": row.created_at,
                "last_seen_at": row.last_seen_at,
                "user_agent": row.user_agent,
                "address": row.client_addr,
                "current": row.id == current,
            }
            for row in rows
        ]


def revoke_session(user_id: int, session_id: int) -> bool:
    """End one live session of ``user_id`` (reason ``REVOKED``); False when it names none."""
    with session_scope() as s:
        ended = store.revoke_sessions(s, user_id, REVOKED, utcnow(), session_id=session_id) == 1
    if ended and getattr(g, _REQUEST_CACHE, None) == session_id:
        setattr(g, _REQUEST_CACHE, None)
    return ended
