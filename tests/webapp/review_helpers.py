"""Helpers shared by the review and saved-view tests: users with tokens, proposals, signatures."""

from __future__ import annotations

import uuid
from types import SimpleNamespace

from werkzeug.security import generate_password_hash

from webapp import auth as webauth
from webapp.store import accounts, session_scope

FAST_HASH = "scrypt:1024:8:1"  # cheap cost for test users; the app reads the cost from the hash


def actor(app, role, display_name=None):
    """A user of ``role`` with a known password and an API token."""
    name, password = f"{role}-{uuid.uuid4().hex[:6]}", f"pw-{uuid.uuid4().hex}"
    with app.app_context(), session_scope() as s:
        user = accounts.add_user(s, name, role, generate_password_hash(password, method=FAST_HASH), display_name)
        token = webauth.create_token(s, user.id, "test")
        user_id = user.id
    return SimpleNamespace(
        id=user_id, name=name, password=password, display_name=display_name or name, role=role,
        headers={"Authorization": f"Bearer {token}"},
    )


def propose(client, who, dataset_id, samples=("W-003",), action="exclude", **extra):
    body = {"samples": list(samples), "reason_category": "measurement error",
            "reason": "balance drift noted in the bench log", "action": action, **extra}
    return client.post(f"/api/v1/datasets/{dataset_id}/exclusions", json=body, headers=who.headers)


def sign(client, who, proposal_id, decision="approve", password=None, comment="checked the raw record"):
    return client.post(
        f"/api/v1/exclusions/{proposal_id}/{decision}",
        json={"password": who.password if password is None else password, "comment": comment},
        headers=who.headers,
    )
