"""Shared fixtures for web-app tests.

- ``app`` / ``client`` / ``runner``: an app on a temporary home folder with SQLite.
- ``app_factory(**config)``: more apps (other settings, another database).
- ``make_user(role, name=None, password=None)``: add a user, returns ``(name, password)``.
- ``auth``: ``auth.login(role)`` signs in through the form as a fresh user of that
  role; ``auth.login_as(name, password)``; ``auth.logout()``; ``auth.token(role)``
  returns ``{"Authorization": "Bearer ..."}`` for a fresh user of that role.
- ``pg_url``: an empty PostgreSQL database (its own, dropped afterwards), from
  ``LATENTDESK_TEST_POSTGRES_URL`` or a throwaway cluster started here; skipped
  when neither is possible, a failure when ``CI=true``.
- ``database_url``: parametrized over SQLite and PostgreSQL.
"""

from __future__ import annotations

import os
import re
import shutil
import socket
import subprocess
import tempfile
import uuid
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from werkzeug.security import generate_password_hash

from webapp.app import create_app
from webapp.store import accounts, session_scope

PG_BIN = Path("/usr/lib/postgresql/15/bin")
IN_CI = os.environ.get("CI", "").lower() == "true"
# Test users get a cheap scrypt cost (n=2**10) so sign-ins stay fast; the app
# reads the cost from the stored hash, production hashes use werkzeug's default.
FAST_HASH = "scrypt:1024:8:1"


def _missing(what: str):
    if IN_CI:
        pytest.fail(f"{what} (CI=true: this is a failure, not a skip)")
    pytest.skip(what)


# -- PostgreSQL ---------------------------------------------------------------

def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _as_postgres(args: list[str]) -> list[str]:
    return ["runuser", "-u", "postgres", "--", *args] if os.geteuid() == 0 else args


@pytest.fixture(scope="session")
def pg_server():
    """Base URL of a PostgreSQL server we may create databases on, or None."""
    url = os.environ.get("LATENTDESK_TEST_POSTGRES_URL")
    if url:
        yield url
        return
    if not (PG_BIN / "initdb").exists() or (os.geteuid() == 0 and shutil.which("runuser") is None):
        yield None
        return
    data = Path(tempfile.mkdtemp(prefix="latentdesk-pg-"))
    if os.geteuid() == 0:
        shutil.chown(data, user="postgres")
    port = _free_port()
    try:
        subprocess.run(_as_postgres([str(PG_BIN / "initdb"), "-D", str(data), "-A", "trust", "-U", "postgres"]),
                       check=True, capture_output=True)
        subprocess.run(
            _as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-l", str(data / "server.log"), "-w",
                          "-o", f"-p {port} -k {data} -c listen_addresses=127.0.0.1 -c fsync=off", "start"]),
            check=True, capture_output=True,
        )
    except (subprocess.CalledProcessError, OSError):
        shutil.rmtree(data, ignore_errors=True)
        yield None
        return
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:{port}/postgres"
    finally:
        subprocess.run(_as_postgres([str(PG_BIN / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"]),
                       capture_output=True)
        shutil.rmtree(data, ignore_errors=True)


@pytest.fixture
def pg_url(pg_server):
    """URL of a new, empty PostgreSQL database, dropped after the test."""
    if pg_server is None:
        _missing("no PostgreSQL: set LATENTDESK_TEST_POSTGRES_URL or install PostgreSQL 15")
    name = f"ld_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(pg_server, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    base, _, _ = pg_server.rpartition("/")
    try:
        yield f"{base}/{name}"
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def database_url(request, tmp_path):
    """The same test on SQLite and on PostgreSQL."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'store.db'}"
    return request.getfixturevalue("pg_url")


# -- apps and users -------------------------------------------------------------

@pytest.fixture
def app_factory(tmp_path):
    made = []

    def build(**config):
        settings = {"TESTING": True, "SECRET_KEY": "test-secret", "HOME": str(tmp_path / "home")}
        settings.update(config)
        app = create_app(settings)
        made.append(app)
        return app

    yield build
    for app in made:
        app.extensions["latentdesk.engine"].dispose()


@pytest.fixture
def app(app_factory):
    return app_factory()


@pytest.fixture
def client(app):
    return app.test_client()


@pytest.fixture
def runner(app):
    return app.test_cli_runner()


def add_user(app, role: str, name: str | None = None, password: str | None = None,
             display_name: str | None = None) -> tuple[str, str]:
    name = name or f"{role}-{uuid.uuid4().hex[:6]}"
    password = password or f"pw-{uuid.uuid4().hex}"
    with app.app_context(), session_scope() as s:
        accounts.add_user(s, name, role, generate_password_hash(password, method=FAST_HASH), display_name)
    return name, password


@pytest.fixture
def make_user(app):
    def make(role: str = "analyst", name: str | None = None, password: str | None = None,
             display_name: str | None = None):
        return add_user(app, role, name, password, display_name)

    return make


def csrf_from(html: str) -> str:
    match = re.search(r'name="csrf_token"(?: type="hidden")? value="([^"]+)"', html)
    assert match, "no CSRF token in the page"
    return match.group(1)


def login(client, name: str, password: str, next_path: str | None = None, **environ):
    page = client.get("/-/login", environ_base=environ)
    data = {"name": name, "password": password, "csrf_token": csrf_from(page.get_data(as_text=True))}
    if next_path is not None:
        data["next"] = next_path
    return client.post("/-/login", data=data, environ_base=environ)


class AuthActions:
    def __init__(self, app, client):
        self.app, self.client = app, client

    def login(self, role: str = "analyst", name: str | None = None):
        name, password = add_user(self.app, role, name)
        response = self.login_as(name, password)
        assert response.status_code == 302, response.get_data(as_text=True)
        return name

    def login_as(self, name: str, password: str, next_path: str | None = None):
        return login(self.client, name, password, next_path)

    def logout(self):
        with self.client.session_transaction() as sess:  # the shell's form carries this token
            token = sess["csrf_token"]
        return self.client.post("/-/logout", data={"csrf_token": token})

    def token(self, role: str = "analyst") -> dict[str, str]:
        from webapp import auth

        name, _ = add_user(self.app, role)
        with self.app.app_context(), session_scope() as s:
            token = auth.create_token(s, accounts.get_user_by_name(s, name).id, "test")
        return {"Authorization": f"Bearer {token}"}


@pytest.fixture
def auth(app, client):
    return AuthActions(app, client)
