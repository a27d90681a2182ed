"""Team administration: accounts by the admin (API, pages, CLI), the user's own account, the admin log.

On SQLite and PostgreSQL (``database_url``) where the database decides: the admin log's
hash chain and its append-only triggers, the last-admin guard, token expiry and scope.

Outside references:
- Grassi, P.A. et al. (2017) NIST SP 800-63B, section 5.1.1.2 (memorized secrets: at least
  8 characters, a blocklist of common passwords, no composition rules; here 12, the app's
  policy): a one-time password from the administrator is replaced by the user's own.
- OWASP Session Management Cheat Sheet: "Renew the Session ID After Any Privilege Level
  Change" and ending the other sessions after a password change or a reset; a disabled
  account's sessions end at once.
- US FDA 21 CFR Part 11, 11.10(e): computer-generated, time-stamped audit trails that never
  obscure earlier entries; a changed entry must be detectable (here: ``log verify`` names it).
- RFC 8785 (JSON Canonicalization Scheme) and FIPS 180-4 (SHA-256), through the ``rfc8785``
  package and hashlib, to recompute an admin-log entry's hash from its stored columns.
- RFC 6750 section 3.1: an expired bearer token is refused with 401; a token without the
  scope a request needs, with 403 ("insufficient_scope").
- Last-admin guard and "a one-time password is shown once": common practice.
"""

from __future__ import annotations

import getpass
import hashlib
import json
import re
from datetime import datetime, timedelta

import pytest
import rfc8785
from flask_login import login_user
from sqlalchemy import select
from sqlalchemy.exc import DBAPIError

from tests.webapp.conftest import add_user, csrf_from, login
from webapp import auth
from webapp.auth import CurrentUser
from webapp.services import admin_log, audit
from webapp.store import accounts, get_engine, session_scope, utcnow
from webapp.store.chain_logs import ADMIN_LOG
from webapp.store.tables import User, UserSession

API = "/api/v1"
NEW_PASSWORD = "a quiet harbour at dawn"


# --- helpers ------------------------------------------------------------------------------------


@pytest.fixture
def team(app_factory, database_url):
    """An app on the parametrized database with one admin signed in (a test client)."""
    app = app_factory(DATABASE_URL=database_url, LOCKOUT_ATTEMPTS=3)
    name, password = add_user(app, "admin", "root", display_name="Robin Root")
    client = app.test_client()
    assert login(client, name, password).status_code == 302
    return app, client


def _signed_in(app, name: str, password: str):
    client = app.test_client()
    response = login(client, name, password)
    assert response.status_code == 302, response.get_data(as_text=True)[:300]
    return client


def _user_row(app, name: str) -> User:
    with app.app_context(), session_scope() as s:
        return accounts.get_user_by_name(s, name)


def _log(app) -> list[dict]:
    with app.app_context(), session_scope() as s:
        from webapp.store import chain_logs

        return [audit.entry_dict(row) for row in chain_logs.iter_entries(s, ADMIN_LOG)]


def _verify(app):
    with app.app_context(), session_scope() as s:
        return audit.verify_chain(s, ADMIN_LOG)


def _add(client, name: str, role: str = "viewer", printed: str | None = None) -> dict:
    response = client.post(f"{API}/users", json={"name": name, "role": role, "printed_name": printed or name.title()})
    assert response.status_code == 201, response.get_json()
    return response.get_json()


def _choose_password(client, old: str, new: str, repeat: str | None = None):
    page = client.get(auth.PASSWORD_PATH)
    return client.post(auth.PASSWORD_PATH, data={"csrf_token": csrf_from(page.get_data(as_text=True)),
                                                 "old_password": old, "new_password": new,
                                                 "repeat_password": new if repeat is None else repeat})


def _later(monkeypatch, **delta):
    shifted = utcnow() + timedelta(**delta)
    monkeypatch.setattr(auth, "utcnow", lambda: shifted)


# --- the API for administrators -------------------------------------------------------------------


def test_non_admins_are_refused_on_every_user_route(team):
    app, _ = team
    for role in ("viewer", "analyst", "reviewer"):
        client = _signed_in(app, *add_user(app, role))
        for method, path, body in (("GET", "/users", None), ("POST", "/users", {"name": "x", "role": "viewer"}),
                                   ("PATCH", "/users/1", {"role": "viewer"}),
                                   ("POST", "/users/1/reset-password", None)):
            response = client.open(API + path, method=method, json=body)
            assert response.status_code == 403, (role, method, path)
            assert response.get_json()["error"]["code"] == "forbidden"
    assert _user_row(app, "root").role == "admin" and _log(app) == []


def test_listing_users_shows_role_state_last_sign_in_and_failures(team):
    app, client = team
    name, _ = add_user(app, "analyst", "lee")
    login(app.test_client(), name, "wrong-password")
    listed = {u["name"]: u for u in client.get(f"{API}/users").get_json()["users"]}
    assert set(listed) == {"root", "lee"}
    assert listed["lee"] == {**listed["lee"], "role": "analyst", "active": True, "failed_sign_ins": 1,
                             "locked_until": None, "last_sign_in": None, "must_change_password": False}
    assert listed["root"]["last_sign_in"] is not None and listed["root"]["printed_name"] == "Robin Root"
    assert all("password_hash" not in u for u in listed.values())


def test_a_user_added_by_the_admin_must_choose_a_password_before_anything_else(team):
    app, client = team
    made = _add(client, "kim", "analyst", "Kim Example")
    one_time = made["password"]
    assert made["user"]["must_change_password"] is True and len(one_time) >= 12

    kim = app.test_client()
    signed_in = login(kim, "kim", one_time, next_path="/review")
    assert signed_in.status_code == 302
    page = kim.get("/review")  # the page asked for sends them to choose a password first
    assert page.status_code == 302 and page.headers["Location"] == f"{auth.PASSWORD_PATH}?next=%2Freview"
    refused = kim.get(f"{API}/datasets")
    assert refused.status_code == 403 and refused.get_json()["error"]["message"] == auth.PASSWORD_DUE
    assert kim.post("/_dash-update-component", json={}).status_code == 403

    assert _choose_password(kim, one_time, NEW_PASSWORD, "a different phrase entirely").status_code == 400
    assert _choose_password(kim, one_time, "kim").status_code == 400  # the policy: too short
    done = _choose_password(kim, one_time, NEW_PASSWORD)
    assert done.status_code == 200 and "Your new password is set" in done.get_data(as_text=True)
    assert kim.get(f"{API}/datasets").status_code == 200
    assert kim.get("/review").status_code == 200
    assert _user_row(app, "kim").must_change_password is False
    assert login(app.test_client(), "kim", one_time).status_code == 401  # one-time: it is gone
    assert [e["action"] for e in _log(app)] == ["user_added", "password_changed"]
    assert _log(app)[1]["payload"]["forced"] is True


def test_the_api_itself_lets_a_user_choose_the_new_password(team):
    app, client = team
    one_time = _add(client, "ola")["password"]
    ola = _signed_in(app, "ola", one_time)
    wrong = ola.post(f"{API}/me/password", json={"old_password": "not it", "new_password": NEW_PASSWORD})
    assert wrong.status_code == 400 and wrong.get_json()["error"]["field"] == "old_password"
    assert _user_row(app, "ola").failed_logins == 1  # a wrong current password counts toward the lockout
    same = ola.post(f"{API}/me/password", json={"old_password": one_time, "new_password": one_time})
    assert same.status_code == 400 and same.get_json()["error"]["field"] == "new_password"
    assert ola.post(f"{API}/me/password", json={"old_password": one_time, "new_password": NEW_PASSWORD}
                    ).status_code == 200
    assert ola.get(f"{API}/datasets").status_code == 200


def test_bad_input_is_a_400_naming_the_field_and_changes_nothing(team):
    app, client = team
    for body, field in (({"name": "two words", "role": "viewer"}, "name"), ({"name": "pat", "role": "owner"}, "role"),
                        ({"name": "pat", "role": "viewer", "extra": 1}, "extra")):
        response = client.post(f"{API}/users", json=body)
        assert response.status_code == 400 and response.get_json()["error"]["field"] == field
    assert client.post(f"{API}/users", json={"name": "root", "role": "viewer"}).status_code == 409
    assert client.patch(f"{API}/users/1", json={}).status_code == 400
    assert client.patch(f"{API}/users/1", json={"disabled": "yes"}).get_json()["error"]["field"] == "disabled"
    assert client.patch(f"{API}/users/999", json={"role": "viewer"}).status_code == 404
    assert client.post(f"{API}/users/999/reset-password").status_code == 404
    assert _log(app) == []


def test_a_reset_ends_the_users_sessions_and_asks_for_a_new_password(team):
    app, client = team
    name, password = add_user(app, "reviewer", "rae")
    rae = _signed_in(app, name, password)
    user_id = _user_row(app, name).id
    reset = client.post(f"{API}/users/{user_id}/reset-password")
    assert reset.status_code == 200 and reset.get_json()["user"]["must_change_password"] is True
    assert rae.get(f"{API}/datasets").status_code == 401
    assert login(app.test_client(), name, password).status_code == 401
    fresh = _signed_in(app, name, reset.get_json()["password"])
    assert fresh.get(f"{API}/datasets").status_code == 403
    assert _log(app)[-1]["action"] == "password_reset" and _log(app)[-1]["payload"]["sessions_ended"] == 1


def test_a_role_change_holds_from_the_users_next_request(team):
    app, client = team
    name, password = add_user(app, "viewer", "val")
    val = _signed_in(app, name, password)
    user_id = _user_row(app, name).id
    assert val.post(f"{API}/views", json={}).status_code == 403  # a viewer may not save views
    changed = client.patch(f"{API}/users/{user_id}", json={"role": "analyst"})
    assert changed.status_code == 200 and changed.get_json()["user"]["role"] == "analyst"
    assert val.post(f"{API}/views", json={}).status_code == 400  # now the role check passes
    assert client.patch(f"{API}/users/{user_id}", json={"role": "admin"}).status_code == 200
    assert val.get(f"{API}/users").status_code == 200
    entry = _log(app)[-1]
    assert entry["payload"]["old_role"] == "analyst" and entry["payload"]["new_role"] == "admin"
    assert entry["actor_name"] == "Robin Root" and entry["payload"]["actor_account"] == "root"


def test_disabling_ends_sessions_and_tokens_and_re_enabling_lets_the_user_in_again(team):
    app, client = team
    name, password = add_user(app, "analyst", "dee")
    dee = _signed_in(app, name, password)
    token = dee.post(f"{API}/me/tokens", json={"name": "nightly"}).get_json()["token"]["token"]
    user_id = _user_row(app, name).id
    assert client.patch(f"{API}/users/{user_id}", json={"disabled": True}).get_json()["user"]["active"] is False
    assert dee.get(f"{API}/datasets").status_code == 401
    assert app.test_client().get(f"{API}/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 401
    assert login(app.test_client(), name, password).status_code == 401
    assert client.patch(f"{API}/users/{user_id}", json={"disabled": False}).get_json()["user"]["active"] is True
    assert login(app.test_client(), name, password).status_code == 302
    assert app.test_client().get(f"{API}/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 401
    disabled = [e for e in _log(app) if e["action"] == "user_disabled"][0]["payload"]
    assert disabled["sessions_ended"] == 1 and disabled["tokens_revoked"] == 1


def test_unlock_ends_the_lock_of_the_account_and_of_its_name_from_that_address(team):
    app, client = team
    name, password = add_user(app, "viewer", "lou")
    for _ in range(3):
        assert login(app.test_client(), name, "wrong-password").status_code == 401
    assert "Too many failed sign-ins" in login(app.test_client(), name, password).get_data(as_text=True)
    listed = {u["name"]: u for u in client.get(f"{API}/users").get_json()["users"]}
    assert listed["lou"]["locked_until"] is not None and listed["lou"]["failed_sign_ins"] == 3
    unlocked = client.patch(f"{API}/users/{_user_row(app, name).id}", json={"unlock": True}).get_json()["user"]
    assert unlocked["locked_until"] is None and unlocked["failed_sign_ins"] == 0
    assert login(app.test_client(), name, password).status_code == 302  # same address as the failures
    assert _log(app)[-1]["action"] == "user_unlocked" and _log(app)[-1]["payload"]["failed_sign_ins"] == 3


def test_the_last_active_admin_can_neither_be_demoted_nor_disabled(team):
    app, client = team
    root_id = _user_row(app, "root").id
    for body in ({"role": "reviewer"}, {"disabled": True}):
        refused = client.patch(f"{API}/users/{root_id}", json=body)
        assert refused.status_code == 409 and refused.get_json()["error"]["code"] == "conflict"
        assert "last active administrator" in refused.get_json()["error"]["message"]
    second = _add(client, "sam", "admin")["user"]
    disabled_admin = client.patch(f"{API}/users/{second['id']}", json={"disabled": True})
    assert disabled_admin.status_code == 200  # root is still there
    assert client.patch(f"{API}/users/{root_id}", json={"role": "reviewer"}).status_code == 409  # sam is disabled
    assert client.patch(f"{API}/users/{second['id']}", json={"disabled": False}).status_code == 200
    assert client.patch(f"{API}/users/{root_id}", json={"role": "reviewer"}).status_code == 200
    assert client.get(f"{API}/users").status_code == 403  # root's next request: a reviewer now
    assert _user_row(app, "root").role == "reviewer"


# --- my account: password, sessions, tokens ---------------------------------------------------------


def test_a_password_change_ends_every_other_session_and_is_logged(team):
    app, _ = team
    name, password = add_user(app, "analyst", "cy")
    here, laptop, phone = (_signed_in(app, name, password) for _ in range(3))
    changed = here.post(f"{API}/me/password", json={"old_password": password, "new_password": NEW_PASSWORD})
    assert changed.status_code == 200 and changed.get_json()["sessions_ended"] == 2
    assert here.get(f"{API}/datasets").status_code == 200
    assert laptop.get(f"{API}/datasets").status_code == 401 and phone.get(f"{API}/datasets").status_code == 401
    assert login(app.test_client(), name, NEW_PASSWORD).status_code == 302
    entry = _log(app)[-1]
    assert entry["action"] == "password_changed" and entry["payload"]["user"]["name"] == name
    assert password not in json.dumps(entry) and NEW_PASSWORD not in json.dumps(entry)


def test_a_read_only_token_may_read_but_not_write(team):
    app, _ = team
    client = _signed_in(app, *add_user(app, "analyst", "ro"))
    made = client.post(f"{API}/me/tokens", json={"name": "dashboard", "read_only": True, "expires_days": 30})
    assert made.status_code == 201
    token = made.get_json()["token"]
    assert token["scope"] == "read-only" and token["state"] == "live"
    headers = {"Authorization": f"Bearer {token['token']}"}
    bare = app.test_client()
    assert bare.get(f"{API}/datasets", headers=headers).status_code == 200
    assert bare.head(f"{API}/datasets", headers=headers).status_code == 200
    for method in ("POST", "PUT", "PATCH", "DELETE"):
        refused = bare.open(f"{API}/datasets", method=method, headers=headers)
        assert refused.status_code == 403, method
        assert refused.get_json()["error"]["message"] == "This token is read-only: it may only read (GET or HEAD)."
    writer = client.post(f"{API}/me/tokens", json={"name": "uploader"}).get_json()["token"]
    assert writer["scope"] == "read-write" and writer["expires_at"] is None
    assert bare.post(f"{API}/datasets", headers={"Authorization": f"Bearer {writer['token']}"}).status_code == 400


def test_an_expired_token_is_401(team, monkeypatch):
    app, _ = team
    client = _signed_in(app, *add_user(app, "viewer", "ex"))
    token = client.post(f"{API}/me/tokens", json={"name": "short", "expires_days": 1}).get_json()["token"]
    headers = {"Authorization": f"Bearer {token['token']}"}
    assert app.test_client().get(f"{API}/datasets", headers=headers).status_code == 200
    _later(monkeypatch, days=1, minutes=1)
    expired = app.test_client().get(f"{API}/datasets", headers=headers)
    assert expired.status_code == 401 and expired.get_json()["error"]["code"] == "unauthenticated"
    assert "expired" in expired.get_json()["error"]["message"]


def test_tokens_are_listed_without_their_value_and_revoked(team):
    app, _ = team
    client = _signed_in(app, *add_user(app, "analyst", "tia"))
    other = _signed_in(app, *add_user(app, "analyst", "ugo"))
    made = client.post(f"{API}/me/tokens", json={"name": "sync"}).get_json()["token"]
    listed = client.get(f"{API}/me/tokens").get_json()["tokens"]
    assert [t["name"] for t in listed] == ["sync"] and "token" not in listed[0]
    assert made["token"] not in json.dumps(listed)
    with app.app_context(), session_scope() as s:
        stored = accounts.list_tokens(s)[0].token_hash
    assert stored == hashlib.sha256(made["token"].encode()).hexdigest()
    assert other.delete(f"{API}/me/tokens/{made['id']}").status_code == 404  # not ugo's token
    assert client.delete(f"{API}/me/tokens/{made['id']}").status_code == 200
    assert client.delete(f"{API}/me/tokens/{made['id']}").status_code == 404
    assert app.test_client().get(f"{API}/datasets",
                                 headers={"Authorization": f"Bearer {made['token']}"}).status_code == 401
    assert client.post(f"{API}/me/tokens", json={"name": "x", "expires_days": 0}).status_code == 400
    assert client.post(f"{API}/me/tokens", json={"name": ""}).get_json()["error"]["field"] == "name"
    assert [e["action"] for e in _log(app)] == ["token_created", "token_revoked"]


# --- the admin log: every action, its chain, the database's refusals -------------------------------


def test_every_admin_action_is_one_entry_and_the_chain_verifies(team):
    app, client = team
    kim = _add(client, "kim", "viewer")
    kim_id = kim["user"]["id"]
    client.patch(f"{API}/users/{kim_id}", json={"role": "analyst"})
    client.patch(f"{API}/users/{kim_id}", json={"disabled": True})
    client.patch(f"{API}/users/{kim_id}", json={"disabled": False})
    client.patch(f"{API}/users/{kim_id}", json={"unlock": True})
    client.post(f"{API}/users/{kim_id}/reset-password")
    token = client.post(f"{API}/me/tokens", json={"name": "admin script"}).get_json()["token"]
    client.delete(f"{API}/me/tokens/{token['id']}")
    client.patch(f"{API}/users/{kim_id}", json={"role": "analyst"})  # no change: no entry
    entries = _log(app)
    assert [e["action"] for e in entries] == [
        "user_added", "role_changed", "user_disabled", "user_enabled", "user_unlocked", "password_reset",
        "token_created", "token_revoked"]
    assert [e["seq"] for e in entries] == list(range(1, 9))
    assert all(e["actor_name"] == "Robin Root" for e in entries)
    assert all(e["payload"]["user"]["name"] == ("root" if e["action"].startswith("token") else "kim") for e in entries)
    assert _verify(app) == (True, None, "intact: 8 entries")
    dumped = json.dumps(entries)
    assert kim["password"] not in dumped and token["token"] not in dumped


def test_an_entry_is_recomputed_from_its_stored_columns_with_rfc8785(team):
    app, client = team
    _add(client, "grün")
    with get_engine(app).connect() as conn:
        row = conn.exec_driver_sql("SELECT seq, at, actor_id, actor_name, action, payload, prev_hash, hash, "
                                   "hash_scheme FROM admin_log").mappings().one()
    at = row["at"] if isinstance(row["at"], datetime) else datetime.fromisoformat(row["at"])
    payload = json.loads(row["payload"]) if isinstance(row["payload"], str) else row["payload"]
    body = {"seq": row["seq"], "at": at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
            "actor": {"id": row["actor_id"], "name": row["actor_name"]}, "action": row["action"],
            "dataset_id": None, "payload": payload, "prev_hash": "0" * 64}
    assert row["hash_scheme"] == "rfc8785" and row["prev_hash"] == "0" * 64
    assert hashlib.sha256(rfc8785.dumps(body)).hexdigest() == row["hash"]


@pytest.mark.parametrize("statement", ["UPDATE admin_log SET action = 'x' WHERE seq = 1",
                                       "DELETE FROM admin_log WHERE seq = 1",
                                       "UPDATE admin_log_head SET seq = 0",
                                       "DELETE FROM admin_log_head"])
def test_the_database_refuses_changes_to_the_admin_log(team, statement):
    app, client = team
    _add(client, "pat")
    with pytest.raises(DBAPIError):
        with get_engine(app).begin() as conn:
            conn.exec_driver_sql(statement)
    assert _verify(app) == (True, None, "intact: 1 entries")


def _behind_the_apps_back(app, sql: str) -> None:
    """Change the admin log as a database superuser would: guards off, then ``sql``."""
    with get_engine(app).begin() as conn:
        if conn.dialect.name == "sqlite":
            for name in ("admin_log_no_update", "admin_log_no_delete", "admin_log_head_forward",
                         "admin_log_head_no_delete"):
                conn.exec_driver_sql(f"DROP TRIGGER IF EXISTS {name}")
        else:
            conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
        conn.exec_driver_sql(sql)


@pytest.mark.parametrize(("statement", "broken"), [
    ("UPDATE admin_log SET payload = '{\"role\": \"admin\"}' WHERE seq = 2", 2),
    ("UPDATE admin_log SET actor_name = 'Someone Else' WHERE seq = 1", 1),
    ("DELETE FROM admin_log WHERE seq = 3", 3),
])
def test_log_verify_names_the_admin_log_and_its_first_broken_entry(app_factory, tmp_path, monkeypatch, capsys,
                                                                  statement, broken):
    from webapp.cli import main

    home = tmp_path / "cli-home"
    home.mkdir()
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    app = app_factory(HOME=str(home))
    for name in ("ana", "bo", "cy"):
        assert main(["users", "add", name, "--role", "viewer"]) == 0
    capsys.readouterr()
    assert main(["log", "verify"]) == 0
    out = capsys.readouterr().out
    assert "review log intact: 0 entries" in out and "admin log intact: 3 entries" in out
    _behind_the_apps_back(app, statement)
    assert main(["log", "verify"]) == 1
    out = capsys.readouterr().out
    assert f"admin log BROKEN at entry {broken}" in out and "review log intact" in out


# --- the command line ------------------------------------------------------------------------------


def test_the_account_commands_change_accounts_and_log_as_the_cli(tmp_path, monkeypatch, capsys, app_factory):
    from webapp.cli import main

    home = tmp_path / "cli-home"
    home.mkdir()
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    app = app_factory(HOME=str(home), LOCKOUT_ATTEMPTS=3)
    assert main(["users", "add", "kim", "--role", "viewer"]) == 0
    assert main(["users", "set-role", "kim", "reviewer"]) == 0
    assert "role viewer -> reviewer" in capsys.readouterr().out
    assert main(["users", "disable", "kim"]) == 0
    assert main(["users", "enable", "kim"]) == 0
    for _ in range(3):
        login(app.test_client(), "kim", "wrong-password")
    assert _user_row(app, "kim").locked_until is not None
    assert main(["users", "unlock", "kim"]) == 0
    assert "3 failed sign-in(s) cleared" in capsys.readouterr().out
    assert main(["users", "reset-password", "kim"]) == 0
    one_time = re.search(r"one-time password (\S+)", capsys.readouterr().out).group(1)
    kim = _signed_in(app, "kim", one_time)
    assert kim.get(f"{API}/datasets").status_code == 403  # must choose a new password first
    assert main(["tokens", "create", "kim", "--expires", "30", "--read-only"]) == 0
    token = capsys.readouterr().out.strip()
    headers = {"Authorization": f"Bearer {token}"}
    with app.app_context(), session_scope() as s:
        row = accounts.find_token(s, auth.token_hash(token))
        assert row.scope == "read-only" and timedelta(days=29) < row.expires_at - utcnow() <= timedelta(days=30)
    assert app.test_client().get(f"{API}/datasets", headers=headers).status_code == 403  # the password is due
    entries = _log(app)
    assert [e["action"] for e in entries] == ["user_added", "role_changed", "user_disabled", "user_enabled",
                                              "user_unlocked", "password_reset", "token_created"]
    assert {e["actor_name"] for e in entries} == {f"cli ({getpass.getuser()})"}
    assert {e["actor_id"] for e in entries} == {None}
    capsys.readouterr()
    assert main(["users", "list"]) == 0
    listed = capsys.readouterr().out
    assert re.search(r"^kim\treviewer\tactive\tkim\tlast sign-in .*must choose a new password$", listed, re.M)


@pytest.mark.parametrize(("argv", "words"), [
    (["users", "set-role", "kim", "viewer"], "has the role viewer already"),
    (["users", "set-role", "ghost", "viewer"], "no user named 'ghost'"),
    (["users", "enable", "kim"], "is active already"),
    (["users", "set-role", "boss", "viewer"], "last active administrator"),
    (["users", "disable", "boss"], "last active administrator"),
    (["tokens", "create", "kim", "--expires", "2020-01-01"], "the day is over already"),
    (["tokens", "create", "kim", "--expires", "tomorrow"], "write it as YYYY-MM-DD"),
    (["tokens", "create", "kim", "--expires", "0"], "from 1 to 3650"),
])
def test_the_account_commands_refuse_with_exit_2_and_log_nothing(tmp_path, monkeypatch, capsys, app_factory,
                                                                argv, words):
    from webapp.cli import main

    home = tmp_path / "cli-home"
    home.mkdir()
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    assert main(["users", "add", "kim", "--role", "viewer"]) == 0
    assert main(["users", "add", "boss", "--role", "admin"]) == 0
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert words in err and "Traceback" not in err
    assert [e["action"] for e in _log(app_factory(HOME=str(home)))] == ["user_added", "user_added"]


def test_a_token_dated_to_a_day_works_through_that_day(tmp_path, monkeypatch, capsys, app_factory):
    from webapp.cli import main

    home = tmp_path / "cli-home"
    home.mkdir()
    monkeypatch.setenv("LATENTDESK_HOME", str(home))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    day = (utcnow() + timedelta(days=3)).date()
    assert main(["users", "add", "kim", "--role", "viewer"]) == 0
    assert main(["tokens", "create", "kim", "--expires", day.isoformat()]) == 0
    token = capsys.readouterr().out.strip().splitlines()[-1]
    app = app_factory(HOME=str(home))
    with app.app_context(), session_scope() as s:
        expires = accounts.find_token(s, auth.token_hash(token)).expires_at
    assert expires.date() == day + timedelta(days=1) and (expires.hour, expires.minute) == (0, 0)
    _later(monkeypatch, days=4)
    assert app.test_client().get(f"{API}/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 401


# --- the pages' functions ------------------------------------------------------------------------------


def _page(module: str):
    import importlib

    return importlib.import_module(f"webapp.web.pages.{module}")


def _as(app, name: str):
    """A request context signed in as ``name`` (no browser session: nothing to keep)."""
    row = _user_row(app, name)
    context = app.test_request_context("/")
    context.push()
    login_user(CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role,
                           must_change_password=row.must_change_password))
    return context


def _text(component) -> str:
    if component is None:
        return ""
    if isinstance(component, (str, int, float)):
        return str(component)
    if isinstance(component, (list, tuple)):
        return " ".join(_text(c) for c in component)
    return _text(getattr(component, "children", None))


def test_the_admin_page_adds_and_changes_accounts_and_shows_the_log(team):
    app, _ = team
    admin = _page("admin")
    context = _as(app, "root")
    try:
        shown = admin.add_account("nia", "Nia Example", "viewer", None)
        one_time = re.search(r"One-time password:\s+(\S+)", _text(shown)).group(1)
        assert "not shown again" in _text(shown)
        refused = admin.add_account("nia", "Nia Again", "viewer", None)
        assert refused.role == "alert" and "already exists" in _text(refused)
        set_by_admin = admin.add_account("ned", "", "analyst", "too short")
        assert set_by_admin.role == "alert" and "too short" in _text(set_by_admin)
        nia_id = _user_row(app, "nia").id
        assert "now has the role reviewer" in _text(admin.change_account("role", nia_id, "reviewer"))
        assert "is disabled" in _text(admin.change_account("disable", nia_id))
        assert "can sign in again" in _text(admin.change_account("enable", nia_id))
        assert "is unlocked" in _text(admin.change_account("unlock", nia_id))
        reset = admin.change_account("reset", nia_id)
        assert re.search(r"One-time password:\s+(\S+)", _text(reset)).group(1) != one_time
        last = admin.change_account("role", _user_row(app, "root").id, "viewer")
        assert last.role == "alert" and "last active administrator" in _text(last)
        assert "Choose the account" in _text(admin.change_account("disable", None))
        page = _text(admin.layout())
        assert "nia" in page and "Admin log verified" in page and "intact: 6 entries" in page
        table, position, number, newer_off, older_off = admin.log_view(1)
        assert position == "Page 1 of 1, 6 entries, newest first." and newer_off and older_off
        assert _text(table).index("reset the password of nia") < _text(table).index("added the account nia")
    finally:
        context.pop()
    viewer = _as(app, add_user(app, "viewer")[0])
    try:  # Dash callbacks answer anyone signed in: the functions refuse non-admins themselves
        assert "Only administrators" in _text(admin.add_account("eve", "Eve", "admin", None))
        assert "Only administrators" in _text(admin.change_account("role", nia_id, "admin"))
    finally:
        viewer.pop()
    assert _user_row(app, "eve") is None and _user_row(app, "nia").role == "reviewer"


def test_the_admin_log_pages_newest_first(team):
    app, client = team
    for i in range(admin_log.PAGE_SIZE + 3):
        _add(client, f"user{i:02d}")
    admin = _page("admin")
    context = _as(app, "root")
    try:
        first, position, _, newer_off, older_off = admin.log_view(1)
        assert position.startswith("Page 1 of 2") and newer_off and not older_off
        second, position, number, newer_off, older_off = admin.log_view(2)
        assert number == 2 and not newer_off and older_off
        assert "user27" in _text(first) and "user00" in _text(second) and "user00" not in _text(first)
        assert admin.log_view(9)[2] == 2  # past the end: the last page
    finally:
        context.pop()


def test_my_account_page_changes_the_password_and_makes_and_revokes_tokens(team):
    app, _ = team
    name, password = add_user(app, "analyst", "mo")
    account = _page("account")
    context = _as(app, name)
    try:
        assert "differ" in _text(account.change_password(password, NEW_PASSWORD, "something else"))
        assert account.change_password("wrong", NEW_PASSWORD, NEW_PASSWORD).role == "alert"
        assert "Your password is changed" in _text(account.change_password(password, NEW_PASSWORD, NEW_PASSWORD))
        made = account.create_token("report script", 7, ["read-only"])
        token = re.search(r"(ldt_\S+)", _text(made)).group(1)
        assert "read-only" in _text(made) and "not shown again" in _text(made)
        assert account.create_token("", 7, []).role == "alert"
        token_id = account.token_options(account._tokens())[0]["value"]
        assert "is revoked" in _text(account.revoke_token(token_id))
        assert "revoked already" in _text(account.revoke_token(token_id))
        assert "report script" in _text(account.layout())
    finally:
        context.pop()
    assert login(app.test_client(), name, NEW_PASSWORD).status_code == 302
    assert app.test_client().get(f"{API}/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 401
    assert [e["action"] for e in _log(app)] == ["password_changed", "token_created", "token_revoked"]


def test_my_account_lists_the_sessions_and_ends_them(team):
    app, _ = team
    name, password = add_user(app, "viewer", "sol")
    first, second, third = (_signed_in(app, name, password) for _ in range(3))
    account = _page("account")
    with first:
        assert first.get("/_dash-layout").status_code == 200  # keeps this request's context open
        listed = account._sessions()
        assert len(listed) == 3 and sum(s["current"] for s in listed) == 1
        other = next(s for s in listed if not s["current"])
        assert "The session ended" in _text(account.end_sessions("one", other["id"]))
        assert "has ended already" in _text(account.end_sessions("one", other["id"]))
        assert "1 other session(s) ended" in _text(account.end_sessions("others"))
    assert first.get(f"{API}/datasets").status_code == 200
    assert second.get(f"{API}/datasets").status_code == 401 and third.get(f"{API}/datasets").status_code == 401
    with app.app_context(), session_scope() as s:
        user_id = accounts.get_user_by_name(s, name).id
        live = s.scalars(select(UserSession).where(UserSession.user_id == user_id,
                                                   UserSession.revoked_at.is_(None))).all()
    assert len(live) == 1


def test_the_nav_shows_admin_to_admins_and_my_account_to_everyone(team):
    app, client = team
    layout = client.get("/_dash-layout").get_data(as_text=True)
    assert '"Admin"' in layout and '"My account"' in layout
    viewer = _signed_in(app, *add_user(app, "viewer"))
    layout = viewer.get("/_dash-layout").get_data(as_text=True)
    assert '"Admin"' not in layout and '"My account"' in layout
    assert viewer.get("/admin").status_code == 403 and viewer.get("/account").status_code == 200
    assert client.get("/admin").status_code == 200


def test_the_migration_downgrades_and_upgrades_again(database_url):
    from alembic import command
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    from webapp.store import make_engine, migrate
    from webapp.store.engine import MIGRATIONS, current_revision

    engine = make_engine(database_url)
    try:
        migrate(engine)
        with engine.begin() as connection:
            config = Config()
            config.set_main_option("script_location", str(MIGRATIONS))
            config.attributes["connection"] = connection
            command.downgrade(config, "0009_sessions")
        assert current_revision(engine) == "0009_sessions"
        migrate(engine)
        assert current_revision(engine) == ScriptDirectory.from_config(config).get_current_head()
        with engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT seq, hash FROM admin_log_head").one() == (0, "0" * 64)
    finally:
        engine.dispose()


# --- on a real server with two workers, SQLite and PostgreSQL ----------------------------------------

LIVE_USERS = [("lina", "analyst", "Lina Live"), ("ria", "viewer", "Ria Live"), ("boss", "admin", "Boss Live")]


@pytest.fixture(scope="module", params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def live(request, tmp_path_factory):
    from session_helpers import live_site

    with live_site(request, tmp_path_factory, {}, LIVE_USERS) as site:
        yield site


def _live_browser(live, name: str, password: str | None = None):
    from session_helpers import Browser

    browser = Browser(live.base)
    assert browser.sign_in(name, password or live.users[name]["password"]).status_code == 302
    return browser


@pytest.mark.slow
def test_on_two_workers_a_password_change_ends_the_other_sessions(live):
    here, laptop, phone = (_live_browser(live, "lina") for _ in range(3))
    changed = here.post(f"{API}/me/password", json={"old_password": live.users["lina"]["password"],
                                                    "new_password": NEW_PASSWORD})
    assert changed.status_code == 200 and changed.json()["sessions_ended"] == 2
    for _ in range(4):  # several requests, so both workers answer some
        assert here.get(f"{API}/datasets").status_code == 200
        assert laptop.get(f"{API}/datasets").status_code == 401 and phone.get(f"{API}/datasets").status_code == 401
    _live_browser(live, "lina", NEW_PASSWORD)


@pytest.mark.slow
def test_on_two_workers_a_role_change_and_a_reset_hold_at_once(live):
    boss, ria = _live_browser(live, "boss"), _live_browser(live, "ria")
    ria_id = live.users["ria"]["id"]
    assert all(ria.get(f"{API}/users").status_code == 403 for _ in range(4))
    assert boss.http.patch(f"{live.base}{API}/users/{ria_id}", json={"role": "admin"}, timeout=60).status_code == 200
    assert all(ria.get(f"{API}/users").status_code == 200 for _ in range(4))
    reset = boss.post(f"{API}/users/{ria_id}/reset-password")
    assert reset.status_code == 200
    assert all(ria.get(f"{API}/users").status_code == 401 for _ in range(4))
    fresh = _live_browser(live, "ria", reset.json()["password"])
    due = fresh.get(f"{API}/users")
    assert due.status_code == 403 and due.json()["error"]["message"] == auth.PASSWORD_DUE
    with live.engine.connect() as conn:
        actions = [row[0] for row in conn.exec_driver_sql("SELECT action FROM admin_log ORDER BY seq")]
    assert actions[-2:] == ["role_changed", "password_reset"]
