"""The admin log: every change to an account, who made it and when, chained by SHA-256.

Added and re-enabled users, role changes, disabled accounts, unlocks, password
resets and changes, API tokens created and revoked: each is one entry, written
in the same transaction as the change itself, by the browser, the API or the
command line (actor ``cli (<OS user>)``). Entries are hashed and verified
exactly as the review log's (``webapp.services.audit`` with
``webapp.store.chain_logs.ADMIN_LOG``); the database refuses to change or
delete them (migration 0010_account_admin), and ``latentdesk log verify``
checks both chains.

References: US FDA 21 CFR Part 11, 11.10(e) (secure, computer-generated,
time-stamped audit trails of who did what, never obscuring earlier entries);
OWASP Logging Cheat Sheet (log account and privilege changes; never log
passwords or tokens) — no secret ever goes into a payload here.
"""

from __future__ import annotations

import getpass
from dataclasses import dataclass
from typing import Any, Callable, Mapping, TypeVar

from webapp.services import audit
from webapp.services.context import session_scope
from webapp.store import chain_logs, engine_session
from webapp.store.chain_logs import ADMIN_LOG

T = TypeVar("T")
PAGE_SIZE = 25

ACTION_WORDS = {
    "user_added": "added the account",
    "role_changed": "changed the role of",
    "user_disabled": "disabled",
    "user_enabled": "re-enabled",
    "user_unlocked": "unlocked",
    "password_reset": "reset the password of",
    "password_changed": "changed the password of",
    "token_created": "created an API token for",
    "token_revoked": "revoked API tokens of",
}


@dataclass(frozen=True)
class Actor:
    """Who makes a change: an account (id, printed name, user name) or the command line."""

    id: int | None
    name: str
    account: str | None = None


def actor_of(user) -> Actor:
    """The signed-in user (``webapp.auth.CurrentUser``) as the actor of a change."""
    return Actor(user.id, user.display_name, user.name)


def cli_actor() -> Actor:
    """The command line, named by the operating-system user running it."""
    try:
        who = getpass.getuser()
    except (KeyError, OSError):  # no login name and no password-database entry (some containers)
        who = "unknown"
    return Actor(None, f"cli ({who})")


def write(work: Callable[[Any], T], *, engine=None) -> T:
    """Run ``work(session)`` in one transaction that holds the admin log's write lock first.

    The app's database inside a Flask application context, else ``engine``'s
    (the command line). The change and its log entry commit together, and two
    administrators' changes never interleave (the last-admin check relies on it).
    """
    scope = engine_session(engine) if engine is not None else session_scope()
    with scope as session:
        chain_logs.lock(session, ADMIN_LOG)
        return work(session)


def record(session, actor: Actor, action: str, user=None, **details: Any):
    """Append one entry: ``action`` by ``actor`` on the account ``user`` (a users row), with ``details``."""
    payload: dict[str, Any] = dict(details)
    if user is not None:
        payload["user"] = {"id": user.id, "name": user.name}
    if actor.account is not None:
        payload["actor_account"] = actor.account
    return audit.append(session, actor_id=actor.id, actor_name=actor.name, action=action, payload=payload,
                        log=ADMIN_LOG)


def describe(entry: Mapping[str, Any]) -> str:
    """One plain sentence for an entry (shown as text, never as HTML)."""
    p = entry.get("payload") or {}
    parts = [ACTION_WORDS.get(entry["action"], entry["action"])]
    if p.get("user"):
        parts[0] += f" {p['user']['name']}"
    if "role" in p:
        parts.append(f"role {p['role']}")
    if "old_role" in p and "new_role" in p:
        parts.append(f"{p['old_role']} → {p['new_role']}")
    if p.get("token_id") is not None:
        parts.append(f"token {p['token_id']}" + (f" ({p['label']})" if p.get("label") else ""))
    if p.get("scope"):
        parts.append(p["scope"])
    if "expires_at" in p:
        parts.append(f"expires {p['expires_at'][:16].replace('T', ' ')} UTC" if p["expires_at"] else "no expiry")
    if p.get("sessions_ended"):
        parts.append(f"{p['sessions_ended']} session(s) ended")
    if p.get("tokens_revoked"):
        parts.append(f"{p['tokens_revoked']} token(s) revoked")
    if p.get("password") == "set by the administrator":
        parts.append("password set by the administrator")
    return "; ".join(parts)


def page(number: int = 1, size: int = PAGE_SIZE) -> dict[str, Any]:
    """Page ``number`` (from 1) of the admin log, newest first: ``entries`` (each with a
    ``summary``), ``page``, ``pages``, ``total``."""
    with session_scope() as session:
        total = chain_logs.count_entries(session, ADMIN_LOG)
        pages = max(1, -(-total // size))
        number = min(max(1, int(number)), pages)
        rows = chain_logs.newest_entries(session, ADMIN_LOG, offset=(number - 1) * size, limit=size)
        entries = [audit.entry_dict(row) for row in rows]
    for entry in entries:
        entry["summary"] = describe(entry)
    return {"entries": entries, "page": number, "pages": pages, "total": total}


def verify() -> dict[str, Any]:
    """The admin log's chain: ``intact``, ``first_broken_seq``, ``reason``, ``head``."""
    with session_scope() as session:
        intact, broken, reason = audit.verify_chain(session, ADMIN_LOG)
        head = audit.chain_head_summary(session, ADMIN_LOG)
    return {"intact": intact, "first_broken_seq": broken, "reason": reason, "head": head}
