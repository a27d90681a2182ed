"""What an administrator does to accounts, and API tokens, each written to the admin log.

One set of rules for the browser, the API and the command line: every function
takes the open database session of a transaction started by
``admin_log.write`` (which holds the admin log's lock) and the ``Actor``, does
one change and records it in the admin log in that transaction.

- A user added by an administrator gets a one-time password (or one the
  administrator sets) and must choose their own at the first sign-in; so does a
  user whose password is reset, and every browser session of theirs ends.
- No change leaves the site without an active administrator: disabling or
  demoting the last one is refused (409).
- Disabling ends the user's sessions and revokes their API tokens; re-enabling
  gives neither back.
- Unlocking clears the failed sign-ins of the account, and of its name from
  every address.

References: Grassi, P.A. et al. (2017) NIST SP 800-63B, section 5.1.1.2
(memorized secrets: the policy every new password passes; a secret chosen by
the verifier is single-use, the user sets their own); OWASP Session Management
Cheat Sheet (end every session at a password reset or a disabled account;
common practice otherwise).
"""

from __future__ import annotations

from datetime import datetime, time, timedelta, timezone
from typing import Any

from analysis.errors import InputError
from webapp import auth
from webapp.auth import sessions
from webapp.services import admin_log
from webapp.services.admin_log import Actor, record
from webapp.services.context import session_scope
from webapp.store import accounts, utcnow
from webapp.store.tables import ROLES

MAX_NAME_CHARS = 80
MAX_DISPLAY_NAME_CHARS = 200
MAX_TOKEN_NAME_CHARS = 200
MAX_TOKEN_DAYS = 3650
PASSWORD_RESET = "password reset by an administrator"


class AccountRefused(InputError):
    """A change the rules refuse; ``status`` and ``code`` are what the API answers."""

    def __init__(self, message: str, *, code: str = "conflict", status: int = 409):
        super().__init__(message)
        self.code = code
        self.status = status


class UserNotFound(LookupError):
    """No user with that id (the API answers 404)."""


class TokenNotFound(LookupError):
    """No live token with that id for that user (the API answers 404)."""


# --- checking what comes in -------------------------------------------------------------------


def check_name(name: Any) -> str:
    """A user name: 1 to 80 characters, no blanks."""
    text = name.strip() if isinstance(name, str) else ""
    if not text or len(text) > MAX_NAME_CHARS or any(ch.isspace() for ch in text):
        raise InputError(f"user name {name!r}: 1 to {MAX_NAME_CHARS} characters without spaces", field="name")
    return text


def check_role(role: Any) -> str:
    if role not in ROLES:
        raise InputError(f"role {role!r}: choose one of {', '.join(ROLES)}", field="role")
    return role


def check_display_name(display_name: Any, name: str) -> str:
    """The printed name shown with signatures; the user name when none is given."""
    if display_name is None or (isinstance(display_name, str) and not display_name.strip()):
        return name
    if not isinstance(display_name, str) or len(display_name.strip()) > MAX_DISPLAY_NAME_CHARS:
        raise InputError(f"printed name: text of at most {MAX_DISPLAY_NAME_CHARS} characters", field="printed_name")
    return display_name.strip()


def token_expiry(days: Any = None, date: Any = None, *, now: datetime | None = None) -> datetime | None:
    """When a new token stops working: ``days`` from now, or the end of ``date`` (YYYY-MM-DD, UTC).

    None when neither is given (the token never expires). At most ``MAX_TOKEN_DAYS``
    ahead (common practice: tokens with an end).
    """
    now = now or utcnow()
    if days is not None and date is not None:
        raise InputError("give the expiry as a number of days or as a date, not both", field="expires_days")
    if days is not None:
        if isinstance(days, bool) or not isinstance(days, int) or not 1 <= days <= MAX_TOKEN_DAYS:
            raise InputError(f"expires_days must be a whole number of days from 1 to {MAX_TOKEN_DAYS}, "
                             f"got {days!r}", field="expires_days")
        return now + timedelta(days=days)
    if date is not None:
        try:
            day = datetime.strptime(str(date), "%Y-%m-%d").date()
        except ValueError:
            raise InputError(f"expiry date {date!r}: write it as YYYY-MM-DD", field="expires") from None
        end = datetime.combine(day + timedelta(days=1), time(), tzinfo=timezone.utc)  # valid through that day
        if end <= now:
            raise InputError(f"expiry date {date}: the day is over already (UTC)", field="expires")
        if end - now > timedelta(days=MAX_TOKEN_DAYS + 1):
            raise InputError(f"expiry date {date}: at most {MAX_TOKEN_DAYS} days ahead", field="expires")
        return end
    return None


def check_token_name(name: Any) -> str:
    text = name.strip() if isinstance(name, str) else ""
    if not text or len(text) > MAX_TOKEN_NAME_CHARS:
        raise InputError(f"token name: what the token is for, 1 to {MAX_TOKEN_NAME_CHARS} characters", field="name")
    return text


# --- finding accounts ---------------------------------------------------------------------------


def user_by_id(session, user_id: int):
    user = accounts.get_user(session, user_id)
    if user is None:
        raise UserNotFound(user_id)
    return user


def user_by_name(session, name: str):
    user = accounts.get_user_by_name(session, name)
    if user is None:
        raise InputError(f"no user named {name!r}")
    return user


def user_dict(user, last_sign_in: datetime | None = None, now: datetime | None = None) -> dict[str, Any]:
    """An account as the admin page and the API show it (never its password hash)."""
    now = now or utcnow()
    locked = user.locked_until if user.locked_until is not None and user.locked_until > now else None
    return {
        "id": user.id,
        "name": user.name,
        "printed_name": user.display_name,
        "role": user.role,
        "active": bool(user.active),
        "must_change_password": bool(user.must_change_password),
        "failed_sign_ins": user.failed_logins or 0,
        "locked_until": locked,
        "last_sign_in": last_sign_in,
        "created_at": user.created_at,
    }


def list_users(session) -> list[dict[str, Any]]:
    """Every account by name, with its last browser sign-in (within the 90 days sessions are kept)."""
    last = accounts.last_sign_ins(session)
    now = utcnow()
    return [user_dict(user, last.get(user.id), now) for user in accounts.list_users(session)]


# --- the changes --------------------------------------------------------------------------------


def _keep_an_admin(session, user, what: str) -> None:
    if user.role == "admin" and user.active and accounts.count_active_admins(session, besides=user.id) == 0:
        raise AccountRefused(f"{user.name} is the last active administrator and cannot be {what}; "
                             "make another user admin first")


def add_user(
    session, actor: Actor, name: Any, role: Any, display_name: Any = None, password: str | None = None,
    *, must_change: bool = True,
) -> tuple[Any, str]:
    """A new account; returns the row and its password (a random one-time password when none is given).

    ``must_change``: the user chooses their own password at the first sign-in.
    """
    name, role = check_name(name), check_role(role)
    display_name = check_display_name(display_name, name)
    chosen = password is not None
    if password is None:
        password = auth.generate_password()
    auth.check_new_password(password, name)
    if accounts.get_user_by_name(session, name) is not None:
        raise AccountRefused(f"user {name!r} already exists")
    user = accounts.add_user(session, name, role, auth.hash_password(password), display_name)
    user.must_change_password = must_change
    session.flush()
    record(session, actor, "user_added", user, role=role, printed_name=display_name,
           password="set by the administrator" if chosen else "one-time password", must_change=must_change)
    return user, password


def set_role(session, actor: Actor, user, role: Any) -> bool:
    """Give ``user`` another role; False (nothing logged) when it already has it."""
    role = check_role(role)
    if user.role == role:
        return False
    if role != "admin":
        _keep_an_admin(session, user, "demoted")
    old = user.role
    accounts.set_role(session, user, role)
    session.flush()
    record(session, actor, "role_changed", user, old_role=old, new_role=role)
    return True


def set_disabled(session, actor: Actor, user, disabled: bool) -> bool:
    """Disable (sessions end, tokens revoked) or re-enable ``user``; False when it already is so."""
    if not isinstance(disabled, bool):
        raise InputError(f"disabled must be true or false, got {disabled!r}", field="disabled")
    if disabled == (not user.active):
        return False
    if disabled:
        _keep_an_admin(session, user, "disabled")
        accounts.set_active(session, user, False)
        ended = sessions.revoke_user_sessions(session, user.id, sessions.ACCOUNT_DISABLED)
        revoked = accounts.revoke_tokens(session, user.id)
        session.flush()
        record(session, actor, "user_disabled", user, sessions_ended=ended, tokens_revoked=revoked)
    else:
        accounts.set_active(session, user, True)
        session.flush()
        record(session, actor, "user_enabled", user)
    return True


def unlock(session, actor: Actor, user) -> None:
    """Clear the failed sign-ins and any lock of ``user`` (from every address)."""
    failures = user.failed_logins or 0
    accounts.unlock(session, user, utcnow())
    session.flush()
    record(session, actor, "user_unlocked", user, failed_sign_ins=failures)


def reset_password(session, actor: Actor, user) -> str:
    """A new one-time password for ``user`` (returned, shown once); they must choose their own at the
    next sign-in, and every session of theirs ends now."""
    password = auth.generate_password()
    accounts.set_password(session, user, auth.hash_password(password), must_change=True)
    ended = sessions.revoke_user_sessions(session, user.id, PASSWORD_RESET)
    session.flush()
    record(session, actor, "password_reset", user, sessions_ended=ended)
    return password


def create_token(
    session, actor: Actor, user, name: Any, *, expires_at: datetime | None = None, read_only: bool = False
) -> tuple[str, int]:
    """A new API token for an active ``user``: ``(token, id)``; the token is shown once, stored hashed."""
    label = check_token_name(name)
    if not isinstance(read_only, bool):
        raise InputError(f"read_only must be true or false, got {read_only!r}", field="read_only")
    if not user.active:
        raise AccountRefused(f"user {user.name!r} is disabled")
    scope = auth.READ_ONLY if read_only else "read-write"
    token = auth.create_token(session, user.id, label, expires_at=expires_at, scope=scope)
    token_id = accounts.find_token(session, auth.token_hash(token)).id
    record(session, actor, "token_created", user, token_id=token_id, label=label, scope=scope,
           expires_at=expires_at)
    return token, token_id


def revoke_tokens(session, actor: Actor, user, token_id: int | None = None) -> int:
    """Revoke ``user``'s live tokens (or the one ``token_id``); returns how many. TokenNotFound when
    ``token_id`` names no live token of theirs."""
    count = accounts.revoke_tokens(session, user.id, token_id)
    if token_id is not None and count == 0:
        raise TokenNotFound(token_id)
    if count:
        record(session, actor, "token_revoked", user, token_id=token_id, tokens_revoked=count)
    return count


def token_dict(token, now: datetime | None = None) -> dict[str, Any]:
    """A token as listed (never its value or hash): its state is live, expired or revoked."""
    now = now or utcnow()
    state = ("revoked" if token.revoked_at is not None
             else "expired" if token.expires_at is not None and token.expires_at <= now else "live")
    return {"id": token.id, "name": token.label, "scope": token.scope, "created_at": token.created_at,
            "expires_at": token.expires_at, "last_used_at": token.last_used_at, "revoked_at": token.revoked_at,
            "state": state}


# --- in a request: the admin page and the API ----------------------------------------------------


def users() -> list[dict[str, Any]]:
    """Every account, for the admin page and ``GET /api/v1/users``."""
    with session_scope() as session:
        return list_users(session)


def add(actor: Actor, name: Any, role: Any, display_name: Any = None, password: Any = None) -> dict[str, Any]:
    """Add an account that must choose its own password at the first sign-in: ``{"user", "password"}``;
    the password (a one-time one unless ``password`` is given) is shown only this once."""
    if password is not None and (not isinstance(password, str) or not password):
        raise InputError("the password is empty; leave it out for a one-time password", field="password")

    def work(session):
        user, given = add_user(session, actor, name, role, display_name, password)
        return {"user": user_dict(user), "password": given}

    return admin_log.write(work)


def update(actor: Actor, user_id: int, *, role: Any = None, disabled: Any = None, unlock_account: Any = False
           ) -> dict[str, Any]:
    """Change the role, disable or re-enable, unlock: any of them, in one transaction."""
    if not isinstance(unlock_account, bool):
        raise InputError(f"unlock must be true or false, got {unlock_account!r}", field="unlock")
    if role is None and disabled is None and not unlock_account:
        raise InputError("nothing to change: send role, disabled or unlock")

    def work(session):
        user = user_by_id(session, user_id)
        if role is not None:
            set_role(session, actor, user, role)
        if disabled is not None:
            set_disabled(session, actor, user, disabled)
        if unlock_account:
            unlock(session, actor, user)
        return user_dict(user, accounts.last_sign_ins(session).get(user.id))

    return admin_log.write(work)


def reset(actor: Actor, user_id: int) -> dict[str, Any]:
    """Reset a password: ``{"user", "password"}`` with the one-time password, shown only this once."""
    def work(session):
        user = user_by_id(session, user_id)
        password = reset_password(session, actor, user)
        return {"user": user_dict(user), "password": password}

    return admin_log.write(work)
