"""Queries for the users who sign in through an OpenID provider.

A provider account is the pair (issuer, subject) of its ID tokens (OpenID
Connect Core 1.0, section 5.7); it is linked to exactly one local user.
"""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session

from webapp.store.tables import OidcIdentity, User
from webapp.store.types import utcnow


def find_user(session: Session, issuer: str, subject: str) -> User | None:
    """The local user linked to this provider account, or None."""
    return session.scalars(
        select(User)
        .join(OidcIdentity, OidcIdentity.user_id == User.id)
        .where(OidcIdentity.issuer == issuer, OidcIdentity.subject == subject)
    ).first()


def link(session: Session, user_id: int, issuer: str, subject: str) -> OidcIdentity:
    identity = OidcIdentity(issuer=issuer, subject=subject, user_id=user_id, created_at=utcnow())
    session.add(identity)
    session.flush()
    return identity


def record_sign_in(session: Session, user: User, issuer: str, subject: str, role: str,
                   display_name: str) -> None:
    """Take the role and name the provider states now, and note the time of sign-in."""
    user.role = role
    user.display_name = display_name
    identity = session.scalars(
        select(OidcIdentity).where(OidcIdentity.issuer == issuer, OidcIdentity.subject == subject)
    ).one()
    identity.last_signed_in_at = utcnow()


def free_user_name(session: Session, wanted: str, limit: int = 80) -> str:
    """``wanted`` when no user has it, else ``wanted-2``, ``wanted-3`` ... (at most ``limit`` long)."""
    base = wanted[:limit]
    candidate, number = base, 1
    while session.scalars(select(User.id).where(User.name == candidate)).first() is not None:
        number += 1
        suffix = f"-{number}"
        candidate = base[: limit - len(suffix)] + suffix
    return candidate
