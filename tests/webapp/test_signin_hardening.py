"""Sign-in limits that hold under parallel attempts and do not lock out a whole network.

Outside references:
- Grassi, P.A. et al. (2017) NIST SP 800-63B, section 5.2.2 "Rate Limiting
  (Throttling)": the verifier limits consecutive failed attempts on one account
  (at most 100), and may accept attempts from addresses that usually succeed,
  as other users share them.
- OWASP Authentication Cheat Sheet: "Account Lockout" (a counter per account, a
  lock for a period), "Authentication and Error Messages" (the same answer
  whether the user name exists or not).
- OWASP Blocking Brute Force Attacks (common practice): limits per source
  address catch many names tried from one place, but many legitimate users can
  share one NAT address, so that limit is set higher than the per-account one.

The parallel test runs against ``gunicorn -w 2`` on loopback (two processes, four
threads each) on SQLite and PostgreSQL; the attacked account has a password hash
of production cost (scrypt n=2**15), so each check takes long enough for parallel
attempts to overlap.
"""

from __future__ import annotations

import re
import threading
from concurrent.futures import ThreadPoolExecutor
from datetime import timedelta

import pytest
from sqlalchemy import select

from session_helpers import Browser, live_site
from tests.webapp.conftest import add_user, login
from webapp import auth
from webapp.store import accounts, engine_session, session_scope, utcnow
from webapp.store.tables import LoginAttempt, User

LOCKOUT_ATTEMPTS = 5
PARALLEL = 40
ALERT = re.compile(r'<p class="ld-alert" role="alert">([^<]*)</p>')


@pytest.fixture(scope="module", params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def site(request, tmp_path_factory):
    settings = {"LOCKOUT_ATTEMPTS": LOCKOUT_ATTEMPTS, "LOCKOUT_MINUTES": 15, "ADDRESS_LOCKOUT_ATTEMPTS": 100}
    with live_site(request, tmp_path_factory, settings, [("target", "reviewer", "Target")]) as running:
        yield running


def _attempts(engine_or_app, name: str) -> list[LoginAttempt]:
    query = select(LoginAttempt).where(LoginAttempt.name == name).order_by(LoginAttempt.id)
    if hasattr(engine_or_app, "app_context"):
        with engine_or_app.app_context(), session_scope() as s:
            return list(s.scalars(query))
    with engine_session(engine_or_app) as s:
        return list(s.scalars(query))


@pytest.mark.slow
def test_forty_parallel_wrong_passwords_get_at_most_the_limit_checked(site):
    name, password = "target", site.users["target"]["password"]
    with engine_session(site.engine) as s:  # production cost, so the checks overlap
        accounts.set_password(s, accounts.get_user_by_name(s, name), auth.hash_password(password))
    browsers = [Browser(site.base) for _ in range(PARALLEL)]
    tokens = [browser.login_token() for browser in browsers]
    start = threading.Barrier(PARALLEL)

    def attempt(k: int):
        start.wait()
        return browsers[k].sign_in(name, f"wrong-guess-{k}", tokens[k])

    with ThreadPoolExecutor(max_workers=PARALLEL) as pool:
        answers = list(pool.map(attempt, range(PARALLEL)))

    assert all(answer.status_code == 401 for answer in answers)
    checked = [answer for answer in answers if auth.BAD_CREDENTIALS in answer.text]
    refused = [answer for answer in answers if "Too many failed sign-ins" in answer.text]
    assert len(checked) == LOCKOUT_ATTEMPTS and len(refused) == PARALLEL - LOCKOUT_ATTEMPTS
    rows = _attempts(site.engine, name)
    assert len(rows) == PARALLEL and not any(row.ok for row in rows)
    assert [row.evaluated for row in rows].count(True) == LOCKOUT_ATTEMPTS

    late = Browser(site.base).sign_in(name, password)  # the right password, now refused unchecked
    assert late.status_code == 401 and "Too many failed sign-ins" in late.text
    assert [row.evaluated for row in _attempts(site.engine, name)].count(True) == LOCKOUT_ATTEMPTS
    with engine_session(site.engine) as s:
        locked_until = s.scalar(select(User.locked_until).where(User.name == name))
    assert timedelta(minutes=14) < locked_until - utcnow() <= timedelta(minutes=15)


@pytest.mark.slow
def test_parallel_password_re_entries_get_at_most_the_limit_checked(app_factory, database_url):
    app = app_factory(DATABASE_URL=database_url, LOCKOUT_ATTEMPTS=3)
    with app.app_context(), session_scope() as s:
        user = accounts.add_user(s, "signer", "reviewer", auth.hash_password("the right passphrase"))
        user_id = user.id
    start = threading.Barrier(12)

    def re_enter(k: int) -> bool:
        with app.test_request_context("/", environ_base={"REMOTE_ADDR": "192.0.2.10"}):
            start.wait()
            return auth.check_password_again(user_id, f"wrong-{k}")

    with ThreadPoolExecutor(max_workers=12) as pool:
        assert not any(pool.map(re_enter, range(12)))
    assert [row.evaluated for row in _attempts(app, "signer")] == [True] * 3
    with app.test_request_context("/"):
        assert not auth.check_password_again(user_id, "the right passphrase")  # locked


def test_a_locked_account_does_not_lock_its_neighbours_behind_one_address(app_factory, database_url):
    app = app_factory(DATABASE_URL=database_url, LOCKOUT_ATTEMPTS=3, ADDRESS_LOCKOUT_ATTEMPTS=100)
    office = {"REMOTE_ADDR": "198.51.100.20"}  # one NAT address for the whole office
    victim, victim_password = add_user(app, "analyst")
    colleague, colleague_password = add_user(app, "analyst")
    for k in range(3):
        assert auth.BAD_CREDENTIALS in login(app.test_client(), victim, f"guess-{k}", **office).get_data(as_text=True)
    assert login(app.test_client(), victim, victim_password, **office).status_code == 401
    assert login(app.test_client(), colleague, colleague_password, **office).status_code == 302


def test_an_unknown_name_is_limited_like_a_real_one(app_factory, database_url):
    """After the limit both answer the same, so the refusal does not tell which names exist."""
    app = app_factory(DATABASE_URL=database_url, LOCKOUT_ATTEMPTS=3)
    real, _ = add_user(app, "viewer")
    where = {"REMOTE_ADDR": "203.0.113.5"}
    answers = {}
    for name in (real, "nobody-by-this-name"):
        for k in range(3):
            login(app.test_client(), name, f"guess-{k}", **where)
        answers[name] = login(app.test_client(), name, "guess-again", **where)
    alerts = {ALERT.search(response.get_data(as_text=True)).group(1) for response in answers.values()}
    assert len(alerts) == 1 and "Too many failed sign-ins. Try again in" in alerts.pop()
    assert {response.status_code for response in answers.values()} == {401}
    assert [row.evaluated for row in _attempts(app, "nobody-by-this-name")] == [True, True, True, False]


def test_the_address_ceiling_names_the_address_and_the_wait(app_factory, database_url, monkeypatch):
    app = app_factory(DATABASE_URL=database_url, LOCKOUT_ATTEMPTS=100, ADDRESS_LOCKOUT_ATTEMPTS=6,
                      LOCKOUT_MINUTES=20)
    name, password = add_user(app, "viewer")
    crowd = {"REMOTE_ADDR": "192.0.2.99"}
    for k in range(6):  # six names, one failure each: no account or pair limit is reached
        assert login(app.test_client(), f"guess-{k}", "nope", **crowd).status_code == 401
    refused = login(app.test_client(), name, password, **crowd)
    text = refused.get_data(as_text=True)
    assert refused.status_code == 401
    assert "Too many failed sign-ins from this network address" in text and "Try again in 20 minutes" in text
    assert login(app.test_client(), name, password, REMOTE_ADDR="192.0.2.100").status_code == 302
    later = utcnow() + timedelta(minutes=21)
    monkeypatch.setattr(auth, "utcnow", lambda: later)
    assert login(app.test_client(), name, password, **crowd).status_code == 302


def test_the_per_address_ceiling_defaults_far_above_the_account_limit(tmp_path):
    from webapp.config import load_config

    config = load_config({"HOME": str(tmp_path), "SECRET_KEY": "x"}, environ={})
    # NIST SP 800-63B 5.2.2: no more than 100 consecutive failures on one account.
    assert config["LOCKOUT_ATTEMPTS"] <= 100
    assert config["ADDRESS_LOCKOUT_ATTEMPTS"] >= 10 * config["LOCKOUT_ATTEMPTS"]
