"""Accounts: password hashing, sign-in, sessions, API tokens, the account CLI.

References: RFC 7914 (scrypt); FIPS 180-4 (SHA-256) through hashlib;
flask-login documentation, "Session Protection"; OWASP Authentication Cheat
Sheet (generic sign-in errors, lockout; common practice).
"""

from __future__ import annotations

import hashlib
import json
import io
import re

import pytest
from sqlalchemy import select

from tests.webapp.conftest import login
from webapp import auth
from webapp.cli import main
from webapp.store import accounts, engine_session, make_engine, session_scope, utcnow
from webapp.store.tables import ApiToken


def test_passwords_are_hashed_with_scrypt_and_a_random_salt():
    first, second = auth.hash_password("correct horse"), auth.hash_password("correct horse")
    assert first.startswith("scrypt:") and first != second
    assert "correct horse" not in first
    assert auth.verify_password(first, "correct horse")
    assert not auth.verify_password(first, "correct horsE")


def test_sign_in_lands_on_the_asked_page_with_the_user_in_the_frame(client, make_user):
    name, password = make_user("reviewer", display_name="Rae Tester")
    response = login(client, name, password, next_path="/datasets/1")
    assert response.status_code == 302 and response.headers["Location"] == "/datasets/1"
    layout = json.dumps(client.get("/_dash-layout").get_json())
    assert "Rae Tester" in layout and "reviewer" in layout and auth.LOGOUT_PATH in layout


@pytest.mark.parametrize("who", ["wrong password", "unknown user"])
def test_refusals_do_not_say_which_part_was_wrong(client, make_user, who):
    name, _ = make_user("viewer")
    response = login(client, name if who == "wrong password" else "nobody-here", "bad-password")
    assert response.status_code == 401
    assert auth.BAD_CREDENTIALS in response.get_data(as_text=True)


def test_every_attempt_is_recorded(app, client, make_user):
    name, password = make_user("viewer")
    login(client, name, "bad-password")
    login(client, name, password)
    with app.app_context(), session_scope() as s:
        from webapp.store.tables import LoginAttempt

        rows = s.scalars(select(LoginAttempt).where(LoginAttempt.name == name).order_by(LoginAttempt.id)).all()
        assert [r.ok for r in rows] == [False, True]
        assert rows[0].client_addr == "127.0.0.1"


def _age_attempts(app, name: str, days: int) -> None:
    from datetime import timedelta

    from sqlalchemy import update

    from webapp.store.tables import LoginAttempt

    with app.app_context(), session_scope() as s:
        s.execute(update(LoginAttempt).where(LoginAttempt.name == name)
                  .values(at=utcnow() - timedelta(days=days)))


def test_old_attempts_are_forgotten_at_the_next_successful_sign_in(app, client, make_user):
    from webapp.store.tables import LoginAttempt

    old_name, _ = make_user("viewer")
    login(client, old_name, "bad-password")
    _age_attempts(app, old_name, days=auth.LOGIN_ATTEMPT_RETENTION.days + 1)
    recent_name, _ = make_user("viewer")
    login(client, recent_name, "bad-password")
    _age_attempts(app, recent_name, days=auth.LOGIN_ATTEMPT_RETENTION.days - 1)
    name, password = make_user("analyst")
    login(client, name, password)
    with app.app_context(), session_scope() as s:
        kept = {r.name for r in s.scalars(select(LoginAttempt))}
    assert kept == {recent_name, name}


def test_disabling_a_user_ends_their_session(app, client, auth):
    name = auth.login("analyst")
    assert client.get("/_dash-layout").status_code == 200
    with app.app_context(), session_scope() as s:
        accounts.set_active(s, accounts.get_user_by_name(s, name), False)
    assert client.get("/_dash-layout").status_code == 401


def test_strong_session_protection_drops_a_session_moved_to_another_browser(client, auth):
    auth.login("viewer")
    assert client.get("/_dash-layout").status_code == 200
    moved = client.get("/_dash-layout", headers={"User-Agent": "SomeOtherBrowser/1.0"})
    assert moved.status_code == 401


def test_sign_in_expires_after_the_configured_hours(app_factory, monkeypatch):
    app = app_factory(SESSION_HOURS=1)
    client = app.test_client()
    from tests.webapp.conftest import add_user

    login(client, *add_user(app, "viewer"))
    assert client.get("/_dash-layout").status_code == 200
    later = auth.time.time() + 3601
    monkeypatch.setattr(auth.time, "time", lambda: later)
    assert client.get("/_dash-layout").status_code == 401


def test_sign_in_starts_a_fresh_session(client, make_user):
    client.get("/-/login")
    with client.session_transaction() as sess:
        sess["planted"] = "by someone else"
    name, password = make_user("viewer")
    login(client, name, password)
    with client.session_transaction() as sess:
        assert "planted" not in sess


def test_tokens_are_stored_as_sha256_only(app):
    with app.app_context(), session_scope() as s:
        user = accounts.add_user(s, "tok", "viewer", auth.hash_password("long-enough-pw"))
        token = auth.create_token(s, user.id, "ci")
    with app.app_context(), session_scope() as s:
        stored = s.scalars(select(ApiToken)).one()
        assert stored.token_hash == hashlib.sha256(token.encode()).hexdigest()
        assert token not in {stored.token_hash, stored.label}
        assert stored.last_used_at is None


def test_token_use_is_recorded(app):
    with app.app_context(), session_scope() as s:
        user = accounts.add_user(s, "tok", "viewer", "x")
        token = auth.create_token(s, user.id)
    assert app.test_client().get("/api/v1/datasets", headers={"Authorization": f"Bearer {token}"}).status_code == 200
    with app.app_context(), session_scope() as s:
        assert s.scalars(select(ApiToken)).one().last_used_at is not None


def test_password_re_entry_counts_toward_lockout(app_factory):
    app = app_factory(LOCKOUT_ATTEMPTS=2)
    with app.app_context(), session_scope() as s:
        user_id = accounts.add_user(s, "signer", "reviewer", auth.hash_password("right-password")).id
    with app.test_request_context("/"):
        assert auth.check_password_again(user_id, "right-password")
        assert not auth.check_password_again(user_id, "wrong-1")
        assert not auth.check_password_again(user_id, "wrong-2")
        assert not auth.check_password_again(user_id, "right-password")  # now locked


@pytest.mark.parametrize(("given", "kept"), [
    ("/datasets/1?tab=scores", "/datasets/1?tab=scores"),
    ("/", "/"),
    ("//evil.example", "/"),
    ("https://evil.example/x", "/"),
    ("/\\evil.example", "/"),
    ("/ok\r\nSet-Cookie: x", "/"),
    (None, "/"),
])
def test_safe_next(given, kept):
    assert auth.safe_next(given) == kept


# -- the account commands -----------------------------------------------------------

@pytest.fixture
def home(tmp_path, monkeypatch):
    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path))
    monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)
    return tmp_path


def _run(capsys, *argv, stdin: str | None = None, monkeypatch=None):
    if stdin is not None:
        monkeypatch.setattr("sys.stdin", io.StringIO(stdin))
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def _user_row(home, name):
    engine = make_engine(f"sqlite:///{home / 'latentdesk.db'}")
    try:
        with engine_session(engine) as s:
            return accounts.get_user_by_name(s, name)
    finally:
        engine.dispose()


def test_users_add_prints_one_handover_line_with_a_working_password(home, capsys):
    code, out, _ = _run(capsys, "users", "add", "kim", "--role", "reviewer", "--display-name", "Kim Q")
    assert code == 0
    match = re.fullmatch(r"user kim \(reviewer\) password (\S+)\n", out)
    assert match
    row = _user_row(home, "kim")
    assert row.role == "reviewer" and row.display_name == "Kim Q"
    assert auth.verify_password(row.password_hash, match.group(1))


def test_users_add_reads_the_password_from_stdin(home, capsys, monkeypatch):
    code, out, _ = _run(capsys, "users", "add", "lee", "--role", "viewer", "--password-stdin",
                        stdin="a-long-password\n", monkeypatch=monkeypatch)
    assert code == 0 and "a-long-password" not in out
    assert auth.verify_password(_user_row(home, "lee").password_hash, "a-long-password")


@pytest.mark.parametrize(("argv", "stdin", "words"), [
    (["users", "add", "lee", "--role", "viewer", "--password-stdin"], "short\n", "password too short"),
    (["users", "add", "lee", "--role", "viewer", "--password-stdin"], "", "no password"),
    (["users", "disable", "ghost"], None, "no user named 'ghost'"),
    (["tokens", "create", "ghost"], None, "no user named 'ghost'"),
])
def test_account_commands_refuse_bad_input_with_exit_2(home, capsys, monkeypatch, argv, stdin, words):
    code, _, err = _run(capsys, *argv, stdin=stdin, monkeypatch=monkeypatch)
    assert code == 2 and words in err and "Traceback" not in err


def test_duplicate_user_is_refused(home, capsys):
    assert _run(capsys, "users", "add", "kim", "--role", "viewer")[0] == 0
    code, _, err = _run(capsys, "users", "add", "kim", "--role", "admin")
    assert code == 2 and "already exists" in err
    assert _user_row(home, "kim").role == "viewer"


def test_token_lifecycle_from_the_command_line(home, capsys, app_factory):
    _run(capsys, "users", "add", "bot", "--role", "analyst")
    code, out, err = _run(capsys, "tokens", "create", "bot", "--label", "nightly")
    token = out.strip()
    assert code == 0 and token.startswith(auth.TOKEN_PREFIX) and "only once" in err
    app = app_factory(HOME=str(home))
    headers = {"Authorization": f"Bearer {token}"}
    assert app.test_client().get("/api/v1/datasets", headers=headers).status_code == 200
    listed = _run(capsys, "tokens", "list", "bot")[1]
    assert "nightly" in listed and token not in listed
    assert _run(capsys, "tokens", "revoke", "bot")[1].startswith("1 token(s)")
    assert app.test_client().get("/api/v1/datasets", headers=headers).status_code == 401


def test_disable_stops_sign_in_and_lists_as_disabled(home, capsys, app_factory):
    password = re.search(r"password (\S+)", _run(capsys, "users", "add", "kim", "--role", "viewer")[1]).group(1)
    code, out, _ = _run(capsys, "users", "disable", "kim")
    assert code == 0
    assert re.search(r"^kim\tviewer\tdisabled", _run(capsys, "users", "list")[1], re.M)
    app = app_factory(HOME=str(home))
    assert login(app.test_client(), "kim", password).status_code == 401
