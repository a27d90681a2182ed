"""Accounts API (``/api/v1``): users for administrators, the caller's own password and tokens.

``/users`` needs the admin role (403 otherwise); ``/me`` is any signed-in user's
own account. Routes call ``webapp.services.user_admin`` and
``webapp.services.my_account`` only; every change lands in the admin log there.
Passwords and tokens made here are in the answer once and never again.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from flask import Blueprint

from webapp.api.responses import (
    API_PREFIX, json_body, json_error, json_ok, register_common_errors, register_not_found, requires,
)
from webapp.auth import api_user
from webapp.services import admin_log, my_account, user_admin
from webapp.services.audit import utc_iso

bp = Blueprint("api_accounts", __name__)
register_common_errors(bp)
register_not_found(bp, user_admin.UserNotFound, "user")
register_not_found(bp, user_admin.TokenNotFound, "live API token of yours")


@bp.errorhandler(user_admin.AccountRefused)
def _refused(exc: user_admin.AccountRefused):
    return json_error(exc.code, str(exc), exc.status)


def _plain(record: dict[str, Any]) -> dict[str, Any]:
    """Times as ISO 8601 UTC text, as every other route gives them."""
    return {key: utc_iso(value) if isinstance(value, datetime) else value for key, value in record.items()}


# --- users (admin) ------------------------------------------------------------------------------


@bp.get(f"{API_PREFIX}/users")
@requires("admin")
def list_users():
    return json_ok(users=[_plain(user) for user in user_admin.users()])


@bp.post(f"{API_PREFIX}/users")
@requires("admin")
def add_user():
    body = json_body({"name", "printed_name", "role"}, required=("name", "role"))
    made = user_admin.add(admin_log.actor_of(api_user()), body["name"], body["role"], body.get("printed_name"))
    return json_ok(status=201, user=_plain(made["user"]), password=made["password"])


@bp.patch(f"{API_PREFIX}/users/<id:user_id>")
@requires("admin")
def update_user(user_id: int):
    body = json_body({"role", "disabled", "unlock"})
    user = user_admin.update(admin_log.actor_of(api_user()), user_id, role=body.get("role"),
                             disabled=body.get("disabled"), unlock_account=body.get("unlock", False))
    return json_ok(user=_plain(user))


@bp.post(f"{API_PREFIX}/users/<id:user_id>/reset-password")
@requires("admin")
def reset_password(user_id: int):
    json_body(set())
    made = user_admin.reset(admin_log.actor_of(api_user()), user_id)
    return json_ok(user=_plain(made["user"]), password=made["password"])


# --- the caller's own account -------------------------------------------------------------------


@bp.post(f"{API_PREFIX}/me/password")
@requires("viewer")
def change_password():
    body = json_body({"old_password", "new_password"}, required=("old_password", "new_password"))
    ended = my_account.change_password(api_user(), body["old_password"], body["new_password"])
    return json_ok(sessions_ended=ended)


@bp.get(f"{API_PREFIX}/me/tokens")
@requires("viewer")
def list_tokens():
    return json_ok(tokens=[_plain(token) for token in my_account.list_tokens(api_user())])


@bp.post(f"{API_PREFIX}/me/tokens")
@requires("viewer")
def create_token():
    body = json_body({"name", "expires_days", "read_only"}, required=("name",))
    made = my_account.create_token(api_user(), body["name"], body.get("expires_days"), body.get("read_only", False))
    return json_ok(status=201, token=_plain(made))


@bp.delete(f"{API_PREFIX}/me/tokens/<id:token_id>")
@requires("viewer")
def revoke_token(token_id: int):
    my_account.revoke_token(api_user(), token_id)
    return json_ok(revoked=token_id)
