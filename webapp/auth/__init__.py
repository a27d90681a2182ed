"""Who is asking and what they may do: sessions, passwords, roles, lockout, tokens.

- Browser sessions: flask-login with strong session protection; cookies are
  HttpOnly, SameSite=Lax, and Secure when ``SECURE_COOKIES`` is on. Each sign-in
  is also a database row, checked on every request and ended at sign-out,
  password change, disabling and idle timeout (``webapp.auth.sessions``).
- Passwords: scrypt (RFC 7914) through werkzeug's ``generate_password_hash``; new
  ones must pass ``check_new_password`` (policy in ``webapp.auth.passwords``).
- Lockout: after ``LOCKOUT_ATTEMPTS`` failures an account is locked for
  ``LOCKOUT_MINUTES``. Each failure is counted in the database before the
  password is checked (``accounts.reserve_password_check``), so parallel
  attempts get no more checks than that. The same number of failures for one
  user name from one client address refuses that pair (also for names that do
  not exist), and ``ADDRESS_LOCKOUT_ATTEMPTS`` failures from one address over
  any names refuse the address, a ceiling high enough for many users behind one
  NAT. All of it lives in the database, so every worker and host sees it.
- API tokens: ``Authorization: Bearer <token>``; shown once, stored as SHA-256,
  revocable, with an optional expiry (401 after it) and a scope: a ``read-only``
  token may only GET and HEAD (403 otherwise). A request carrying a token is
  decided by the token alone, whatever session cookie comes with it.
- A password set or reset by an administrator: until the user chooses a new one
  (``PASSWORD_PATH``), pages send them there and every other request is refused
  with 403 (``PASSWORD_DUE``).
- Roles: viewer < analyst < reviewer < admin. ``authorize`` is the one place
  that decides between 401, 403 and 404.

References: OWASP Authentication and Session Management Cheat Sheets;
Grassi, P.A. et al. (2017) NIST SP 800-63B, section 5.2.2 (rate limiting);
flask-login documentation (session protection, ``next`` validation).
"""

from __future__ import annotations

import hashlib
import hmac
import math
import secrets
import time
from dataclasses import dataclass
from datetime import timedelta
from functools import wraps
from typing import Callable
from urllib.parse import urlencode, urlsplit

from flask import (
    Flask, abort, current_app, g, has_request_context, jsonify, make_response, redirect, request, session, url_for,
)
from flask_login import LoginManager, UserMixin, current_user, logout_user
from werkzeug.exceptions import HTTPException
from werkzeug.security import check_password_hash, generate_password_hash

from analysis.errors import InputError
from webapp.auth import passwords, sessions
from webapp.store import accounts, session_scope, utcnow
from webapp.store.tables import ROLES, TOKEN_SCOPES

ROLE_RANK = {role: rank for rank, role in enumerate(ROLES)}
TOKEN_PREFIX = "ldt_"
TOKEN_TOUCH_INTERVAL = timedelta(minutes=1)
# Sign-in attempts feed the lockout (minutes) and a security review (weeks); older ones are
# deleted at every successful sign-in and at server start, so an attack cannot fill the database.
LOGIN_ATTEMPT_RETENTION = timedelta(days=90)
LOGIN_PATH = "/-/login"
LOGOUT_PATH = "/-/logout"
# Single sign-on (webapp.auth.oidc, webapp.web.oidc_signin); not found unless configured.
OIDC_LOGIN_PATH = "/-/oidc/login"
OIDC_CALLBACK_PATH = "/-/oidc/callback"
# Where a user whose password an administrator set chooses their own (webapp.web.signin), and the
# requests open to them until they have: that page, signing out, the API's own password change.
PASSWORD_PATH = "/-/password"
OPEN_WHILE_PASSWORD_DUE = (PASSWORD_PATH, LOGOUT_PATH, "/api/v1/me/password")
READ_ONLY = "read-only"  # one of TOKEN_SCOPES: GET and HEAD only
# Paths served without a session: the sign-in form, health check and styles.
PUBLIC_PATHS = (LOGIN_PATH, OIDC_LOGIN_PATH, OIDC_CALLBACK_PATH, "/health")
PUBLIC_PREFIXES = ("/assets/",)
# Requests answered with JSON (401/403 bodies) instead of a redirect or page.
JSON_PREFIXES = ("/api/", "/_dash-", "/_reload-hash", "/_alive_")
CSRF_SESSION_KEY = "csrf_token"
# The web layer registers its page renderer here (``webapp.web.signin``), so this
# package never imports the layer above it.
ERROR_PAGE_KEY = "latentdesk.error_page"
SIGNED_IN_AT_KEY = "signed_in_at"
# Checked against when the user name is unknown, so both cases cost one scrypt run.
# The hash of a random password that was thrown away (same cost as real hashes).
_DUMMY_HASH = (
    "scrypt:32768:8:1$cRsbsva9jNVTZy8f$b723a35db6e65b5c03f2c310fbd6fa6a045b3d4472bcd9cfcbce9b27acc97d54"
    "bb8939f8c4b63d595f8a999af195fa01ca5212463684e7aa05b6d413e5597fe8"
)

login_manager = LoginManager()
login_manager.session_protection = "strong"
login_manager.login_view = "auth.login"


@dataclass(frozen=True)
class CurrentUser(UserMixin):
    """The signed-in user as the request sees it (a detached copy of the row)."""

    id: int
    name: str
    display_name: str
    role: str
    must_change_password: bool = False

    def get_id(self) -> str:
        return str(self.id)

    def has_role(self, role: str) -> bool:
        return has_role(self.role, role)


def has_role(user_or_role, needed: str) -> bool:
    """True when a user (or a role name) ranks at least ``needed`` (admin has every right)."""
    actual = getattr(user_or_role, "role", user_or_role)
    return ROLE_RANK[actual] >= ROLE_RANK[needed]


def api_user() -> CurrentUser | None:
    """The user behind this request (session or bearer token), or None."""
    return current_user._get_current_object() if current_user.is_authenticated else None


def _from_row(row) -> CurrentUser:
    return CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role,
                       must_change_password=bool(row.must_change_password))


# -- passwords -------------------------------------------------------------

def hash_password(password: str) -> str:
    """scrypt hash with a random salt (werkzeug: n=2**15, r=8, p=1)."""
    return generate_password_hash(password, method="scrypt")


def verify_password(password_hash: str, password: str) -> bool:
    return check_password_hash(password_hash, password)


def check_new_password(password: str, name: str | None = None) -> None:
    """Raise InputError unless ``password`` may be set for the account ``name``.

    The one check every way of setting a password goes through; the policy
    (NIST SP 800-63B, 2017, section 5.1.1.2) lives in ``webapp.auth.passwords``.
    """
    passwords.check(password, name)


def generate_password() -> str:
    return secrets.token_urlsafe(12)


# -- API tokens ------------------------------------------------------------

def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


TOKEN_REFUSED = "The API token is unknown, revoked or belongs to a disabled user."
TOKEN_EXPIRED = "The API token expired at {at} UTC; create a new one on the My account page."
READ_ONLY_REFUSED = "This token is read-only: it may only read (GET or HEAD)."
PASSWORD_DUE = (
    "An administrator set this account's password: choose a new one before anything else,"
    f" in the browser at {PASSWORD_PATH} or with POST /api/v1/me/password."
)


def create_token(
    session_, user_id: int, label: str = "", *, expires_at=None, scope: str = "read-write"
) -> str:
    """Store a new token for ``user_id`` (hashed) and return it; it is never shown again.

    ``expires_at`` (aware UTC; None: never) and ``scope`` (``TOKEN_SCOPES``) are
    checked by every request that carries it.
    """
    if scope not in TOKEN_SCOPES:
        raise InputError(f"token scope {scope!r}: choose {' or '.join(TOKEN_SCOPES)}", field="scope")
    token = TOKEN_PREFIX + secrets.token_urlsafe(32)
    accounts.add_token(session_, user_id, token_hash(token), label, expires_at=expires_at, scope=scope)
    return token


@dataclass(frozen=True)
class TokenCheck:
    """What a bearer token is worth: its user and scope, or why it is refused."""

    user: CurrentUser | None
    scope: str | None = None
    refusal: str = TOKEN_REFUSED


def check_token(session_, token: str) -> TokenCheck:
    """The active user owning a live, unexpired token and the token's scope, or the refusal."""
    row = accounts.find_token(session_, token_hash(token))
    if row is None or row.revoked_at is not None:
        return TokenCheck(None)
    user = accounts.get_user(session_, row.user_id)
    if user is None or not user.active:
        return TokenCheck(None)
    now = utcnow()
    if row.expires_at is not None and row.expires_at <= now:
        return TokenCheck(None, refusal=TOKEN_EXPIRED.format(at=row.expires_at.strftime("%Y-%m-%d %H:%M")))
    # Record use at most once a minute: a write per API call would make every
    # request contend for the database.
    if row.last_used_at is None or now - row.last_used_at > TOKEN_TOUCH_INTERVAL:
        accounts.touch_token(session_, row.id)
    return TokenCheck(_from_row(user), row.scope)


def _bearer_token() -> str | None:
    header = request.headers.get("Authorization", "")
    scheme, _, value = header.partition(" ")
    if scheme.lower() == "bearer" and value.strip():
        return value.strip()
    return None


@login_manager.user_loader
def _load_user(user_id: str) -> CurrentUser | None:
    """The user of a live browser session; None when a bearer token comes along (it decides)."""
    if _bearer_token() is not None:
        return None
    try:
        key = int(user_id)
    except (TypeError, ValueError):
        return None
    if not sessions.current_is_valid():
        session.clear()  # signed out elsewhere, timed out or revoked: the cookie is spent
        return None
    with session_scope() as s:
        row = accounts.get_user(s, key)
        return _from_row(row) if row is not None and row.active else None


@login_manager.request_loader
def _load_user_from_token(req) -> CurrentUser | None:
    token = _bearer_token()
    if token is None:
        return None
    with session_scope() as s:
        checked = check_token(s, token)
    if checked.user is None:
        g.token_refusal = checked.refusal
        return None
    g.auth_via = "token"
    g.token_scope = checked.scope
    return checked.user


# -- login, lockout --------------------------------------------------------

def client_address() -> str:
    return request.remote_addr or "unknown"


class LoginRefused(Exception):
    """Sign-in refused; the message is safe to show."""


LOCKED_MESSAGE = "Too many failed sign-ins. Try again in {minutes} minutes."
ADDRESS_LOCKED_MESSAGE = (
    "Too many failed sign-ins from this network address. Try again in {minutes} minutes,"
    " or ask an administrator if many people share this address."
)
BAD_CREDENTIALS = "Unknown user name or wrong password."


def attempt_login(name: str, password: str, address: str) -> CurrentUser:
    """Check a sign-in against the password and the lockouts; records the attempt.

    The attempt is committed before a refusal is raised, so failures count.
    """
    refusal = _try_login(name, password, address)
    if isinstance(refusal, str):
        raise LoginRefused(refusal)
    return refusal


def _minutes_until(moment, now) -> int:
    return max(1, math.ceil((moment - now).total_seconds() / 60)) if moment is not None else 1


def _try_login(name: str, password: str, address: str) -> CurrentUser | str:
    """Refuse on a lockout, else count a failure, check the password, and clear the count if it is right.

    The first transaction (a write transaction from its start on SQLite) reads
    the counts and stores the attempt and the account's failure as if the
    password were wrong; only then is the password checked, outside any
    transaction. So parallel attempts see each other's failures, and at most
    ``LOCKOUT_ATTEMPTS`` passwords are checked per account per lock period
    (NIST SP 800-63B, 2017, section 5.2.2).
    """
    cfg = current_app.config
    window = timedelta(minutes=cfg["LOCKOUT_MINUTES"])
    now = utcnow()
    with session_scope() as s:
        accounts.begin_sign_in_check(s)
        if accounts.failed_attempts_from(s, address, now - window) >= cfg["ADDRESS_LOCKOUT_ATTEMPTS"]:
            accounts.record_login_attempt(s, name, address, ok=False, evaluated=False)
            return ADDRESS_LOCKED_MESSAGE.format(minutes=cfg["LOCKOUT_MINUTES"])
        row = accounts.get_user_by_name(s, name)
        # An administrator's unlock ends the lock of this name from every address, too.
        since = max(now - window, row.unlocked_at) if row is not None and row.unlocked_at else now - window
        if accounts.failed_attempts_for(s, address, name, since) >= cfg["LOCKOUT_ATTEMPTS"]:
            accounts.record_login_attempt(s, name, address, ok=False, evaluated=False)
            return LOCKED_MESSAGE.format(minutes=cfg["LOCKOUT_MINUTES"])
        if row is not None and not accounts.reserve_password_check(
            s, row.id, now=now, max_failures=cfg["LOCKOUT_ATTEMPTS"], lock_until=now + window
        ):
            accounts.record_login_attempt(s, name, address, ok=False, evaluated=False)
            return LOCKED_MESSAGE.format(minutes=_minutes_until(accounts.locked_until(s, row.id), now))
        attempt_id = accounts.record_login_attempt(s, name, address, ok=False, evaluated=True)
        # Hash even for unknown names so timing does not reveal which names exist.
        password_hash = row.password_hash if row is not None else _DUMMY_HASH
        user = _from_row(row) if row is not None and row.active else None
    if not verify_password(password_hash, password) or user is None:
        return BAD_CREDENTIALS
    with session_scope() as s:
        accounts.mark_login_attempt_ok(s, attempt_id)
        accounts.clear_failed_logins(s, user.id)
        accounts.prune_login_attempts(s, now - LOGIN_ATTEMPT_RETENTION)
    return user


def check_password_again(user_id: int, password: str) -> bool:
    """Re-ask the signed-in user's password (sign-offs); failures count toward lockout.

    Counted before the check, as at sign-in (``_try_login``).
    """
    cfg = current_app.config
    now = utcnow()
    with session_scope() as s:
        accounts.begin_sign_in_check(s)
        row = accounts.get_user(s, user_id)
        if row is None or not row.active:
            return False
        if not accounts.reserve_password_check(
            s, row.id, now=now, max_failures=cfg["LOCKOUT_ATTEMPTS"],
            lock_until=now + timedelta(minutes=cfg["LOCKOUT_MINUTES"]),
        ):
            return False
        name, password_hash = row.name, row.password_hash
    ok = verify_password(password_hash, password)
    with session_scope() as s:
        if ok:
            accounts.clear_failed_logins(s, user_id)
        else:
            accounts.record_login_attempt(s, name, client_address(), ok=False, evaluated=True)
    return ok


def change_password(user_id: int, new_password: str, *, record: Callable | None = None) -> int:
    """Give ``user_id`` a new password and end their other sessions; returns how many ended.

    The policy check comes first (InputError, nothing changed). When this
    request is that user's own browser session, it stays signed in; every
    other session of the user ends (OWASP Session Management Cheat Sheet:
    invalidate sessions after a password change). The failure count, any
    lock and a pending forced change are cleared. ``record(db_session, user_row,
    sessions_ended)`` runs in the same transaction (the admin log entry), so
    the change and its record commit together.
    """
    own = (
        has_request_context()
        and current_user.is_authenticated
        and current_user.id == user_id
        and getattr(g, "auth_via", None) != "token"
    )
    keep = sessions.current_session_id() if own else None
    with session_scope() as s:
        row = accounts.get_user(s, user_id)
        if row is None:
            raise InputError(f"no user with id {user_id}", field="user_id")
        check_new_password(new_password, row.name)
        accounts.set_password(s, row, hash_password(new_password))
        ended = sessions.revoke_user_sessions(s, user_id, sessions.PASSWORD_CHANGED, keep_session_id=keep)
        if record is not None:
            record(s, row, ended)
        return ended


def safe_next(target: str | None) -> str:
    """``target`` when it is a same-site relative path, otherwise ``/``.

    Refuses scheme- or host-bearing URLs, protocol-relative ``//host``,
    backslashes (browsers read ``/\\host`` as ``//host``) and control characters.
    """
    if not target or not target.startswith("/") or target.startswith("//"):
        return "/"
    if "\\" in target or any(ord(ch) < 32 or ord(ch) == 127 for ch in target):
        return "/"
    parts = urlsplit(target)
    if parts.scheme or parts.netloc:
        return "/"
    return target


# -- CSRF for our own forms --------------------------------------------------

def csrf_token() -> str:
    """The per-session token embedded in our HTML forms."""
    token = session.get(CSRF_SESSION_KEY)
    if not token:
        token = secrets.token_urlsafe(32)
        session[CSRF_SESSION_KEY] = token
    return token


def csrf_valid(submitted: str | None) -> bool:
    expected = session.get(CSRF_SESSION_KEY)
    return bool(expected and submitted and hmac.compare_digest(expected, submitted))


# -- 401 / 403 / 404 -------------------------------------------------------

def wants_json() -> bool:
    return request.path.startswith(JSON_PREFIXES) or _bearer_token() is not None


def _json_error(code: str, message: str, status: int):
    return make_response(jsonify(ok=False, error={"code": code, "message": message}), status)


def denial(status: int, message: str | None = None):
    """The response for a refused request, shaped for who is asking.

    401: JSON for API/Dash/token requests, else a redirect to the sign-in form
    carrying the current path as ``next``. 403 and 404: JSON or a small page.
    """
    texts = {
        401: ("unauthenticated", "Sign in first."),
        403: ("forbidden", "Your role does not allow this."),
        404: ("not_found", "Not found."),
    }
    code, default = texts[status]
    message = message or default
    if wants_json():
        response = _json_error(code, message, status)
        if status == 401:
            response.headers["WWW-Authenticate"] = 'Bearer realm="latentdesk"'
        return response
    if status == 401:
        if request.method != "GET":  # a form post cannot be replayed after signing in
            return redirect(url_for("auth.login"))
        target = request.full_path if request.query_string else request.path
        return redirect(url_for("auth.login", next=safe_next(target)))
    render = current_app.extensions.get(ERROR_PAGE_KEY)
    if render is None:  # no page renderer registered (an app without the web blueprint)
        return make_response(message, status, {"Content-Type": "text/plain; charset=utf-8"})
    return render(status, message)


def authorize(role: str = "viewer", *, found: bool = True, message: str | None = None) -> None:
    """Abort with 401, 403 or 404, in that order, unless the request may go on.

    Authentication is checked before the role, and the role before existence, so
    an outsider cannot probe which records exist.
    """
    if not current_user.is_authenticated:
        abort(denial(401))
    if not has_role(current_user.role, role):
        abort(denial(403, message))
    if not found:
        abort(denial(404, message))


def role_required(*roles: str) -> Callable:
    """Decorator: the view needs at least the lowest of ``roles``.

    ``role_required("analyst")`` admits analysts, reviewers and admins. The
    needed role is kept on the view as ``min_role`` so tests can list it.
    """
    needed = min(roles or ("viewer",), key=ROLE_RANK.__getitem__)

    def decorate(view: Callable) -> Callable:
        @wraps(view)
        def guarded(*args, **kwargs):
            authorize(needed)
            return view(*args, **kwargs)

        guarded.min_role = needed
        return guarded

    return decorate


api_auth = role_required


# -- the request guard ------------------------------------------------------

def _is_public(path: str) -> bool:
    return path in PUBLIC_PATHS or path.startswith(PUBLIC_PREFIXES)


def _page_min_role(path: str) -> str | None:
    """The ``min_role`` a Dash page declares in ``register_page`` (None: any user).

    Pages opt in with ``dash.register_page(__name__, path=..., min_role="reviewer")``.
    """
    import dash

    for page in dash.page_registry.values():
        role = page.get("min_role")
        if role is None:
            continue
        if page.get("path") == path or matches_path_template(page.get("path_template"), path):
            return role
    return None


def matches_path_template(template: str | None, path: str) -> bool:
    """Whether ``path`` fits a Dash page's ``path_template`` ('/datasets/<dataset_id>')."""
    if not template:
        return False
    wanted, given = template.strip("/").split("/"), path.strip("/").split("/")
    return len(wanted) == len(given) and all(
        w.startswith("<") and w.endswith(">") or w == p for w, p in zip(wanted, given)
    )


def guard_request():
    """Runs before every request: nothing but the public paths without a user."""
    if request.method == "OPTIONS" and _is_public(request.path):
        return None
    if _bearer_token() is not None and not current_user.is_authenticated:
        return denial(401, getattr(g, "token_refusal", None) or TOKEN_REFUSED)
    if getattr(g, "auth_via", None) != "token" and _session_expired():
        sessions.revoke_current(sessions.LIFETIME)
        logout_user()
        session.clear()
    if _is_public(request.path):
        return None
    if not current_user.is_authenticated:
        return denial(401)
    if request.method not in ("GET", "HEAD", "OPTIONS") and not _same_origin():
        return denial(403, "Cross-site request refused.")
    if getattr(g, "auth_via", None) == "token" and g.token_scope == READ_ONLY and request.method not in ("GET", "HEAD"):
        return denial(403, READ_ONLY_REFUSED)
    if current_user.must_change_password and request.path not in OPEN_WHILE_PASSWORD_DUE:
        return _password_due()
    role = _page_min_role(request.path) if request.method == "GET" else None
    if role is not None and not has_role(current_user.role, role):
        return denial(403)
    return None


def _password_due():
    """A user who must choose a new password first: 403 for the API and Dash, the page otherwise."""
    if wants_json():
        return denial(403, PASSWORD_DUE)
    if request.method != "GET":
        return redirect(PASSWORD_PATH)
    target = request.full_path if request.query_string else request.path
    return redirect(f"{PASSWORD_PATH}?{urlencode({'next': safe_next(target)})}")


def _session_expired() -> bool:
    """A browser sign-in older than ``SESSION_HOURS`` (token requests have none)."""
    signed_in_at = session.get(SIGNED_IN_AT_KEY)
    if signed_in_at is None:
        return False
    return time.time() - signed_in_at > current_app.config["SESSION_HOURS"] * 3600


def _same_origin() -> bool:
    """Browsers send Origin on cross-site POSTs; refuse those that name another host.

    Defence in depth next to SameSite=Lax cookies (OWASP CSRF Prevention Cheat
    Sheet, "Verifying Origin with standard headers"). Token requests carry no
    ambient credentials, so they need no such check.
    """
    if getattr(g, "auth_via", None) == "token":
        return True
    origin = request.headers.get("Origin")
    if not origin:
        return True
    return urlsplit(origin).netloc == request.host


def init_app(app: Flask) -> None:
    cfg = app.config
    app.config.update(
        SESSION_COOKIE_NAME="latentdesk_session",
        SESSION_COOKIE_HTTPONLY=True,
        SESSION_COOKIE_SAMESITE="Lax",
        SESSION_COOKIE_SECURE=bool(cfg["SECURE_COOKIES"]),
        REMEMBER_COOKIE_HTTPONLY=True,
        REMEMBER_COOKIE_SAMESITE="Lax",
        REMEMBER_COOKIE_SECURE=bool(cfg["SECURE_COOKIES"]),
    )
    login_manager.init_app(app)
    app.before_request(guard_request)

    @app.errorhandler(401)
    def _unauthorized(_exc: HTTPException):
        return denial(401)

    @app.errorhandler(403)
    def _forbidden(exc: HTTPException):
        return denial(403)

    @app.errorhandler(404)
    def _not_found(exc: HTTPException):
        return denial(404)

    @app.errorhandler(405)
    def _method_not_allowed(exc: HTTPException):
        if wants_json():
            answer = _json_error("method_not_allowed", f"{request.method} is not allowed here.", 405)
            if getattr(exc, "valid_methods", None):
                answer.headers["Allow"] = ", ".join(exc.valid_methods)  # RFC 9110 section 15.5.6
            return answer
        return exc

    @app.errorhandler(413)
    def _too_large(exc: HTTPException):
        limit = app.config["MAX_UPLOAD_MB"]
        message = f"The upload is larger than the limit of {limit} MB."
        if wants_json():
            return _json_error("too_large", message, 413)
        return make_response(message, 413)
