"""A two-worker LatentDesk server for the session and sign-in tests, and a browser for it.

``live_site(request, tmp_path_factory, settings, users)`` starts ``gunicorn -w 2``
(``live_server.running_server``) on SQLite or on a new PostgreSQL database,
with ``settings`` written to the home folder's ``latentdesk.toml`` so the test
knows the values the workers run with. ``Browser`` signs in and out through
the forms, the way a person's browser does.
"""

from __future__ import annotations

import os
import re
import uuid
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import pytest
import requests
from sqlalchemy import create_engine, text

from live_server import prepared_home, running_server
from webapp.store import make_engine

COOKIE = "latentdesk_session"


@dataclass
class Site:
    """A running server: its address, the database both workers use, the users made for it."""

    base: str
    home: Path
    database_url: str
    engine: Any
    app: Any  # an app on the same home and database, for request contexts and service calls
    users: dict[str, dict] = field(default_factory=dict)


def _toml(settings: dict[str, Any]) -> str:
    lines = []
    for key, value in settings.items():
        shown = str(value).lower() if isinstance(value, bool) else value if isinstance(value, int) else f'"{value}"'
        lines.append(f"{key.lower()} = {shown}")
    return "\n".join(lines) + "\n"


@contextmanager
def _database(kind: str, request, home: Path) -> Iterator[str | None]:
    """None for SQLite in the home folder, else the URL of a new PostgreSQL database (dropped afterwards)."""
    if kind == "sqlite":
        yield None
        return
    server = request.getfixturevalue("pg_server")
    if server is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("no PostgreSQL (CI=true: this is a failure, not a skip)")
        pytest.skip("no PostgreSQL: set LATENTDESK_TEST_POSTGRES_URL or install PostgreSQL 15")
    name = f"ld_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        yield f"{server.rpartition('/')[0]}/{name}"
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


@contextmanager
def live_site(request, tmp_path_factory, settings: dict[str, Any], users: list[tuple[str, str, str]]):
    """Yield a ``Site`` on the database kind ``request.param`` ("sqlite" or "postgresql")."""
    home = tmp_path_factory.mktemp("home")
    (home / "latentdesk.toml").write_text(_toml(settings), encoding="utf-8")
    with _database(request.param, request, home) as url:
        made = prepared_home(home, url, users)
        app = made.pop("_app")
        app.extensions["latentdesk.engine"].dispose()  # migrated once, before the workers start
        database_url = url or f"sqlite:///{home / 'latentdesk.db'}"
        engine = make_engine(database_url)
        try:
            with running_server(home, url) as base:
                yield Site(base=base, home=home, database_url=database_url, engine=engine, app=app, users=made)
        finally:
            engine.dispose()
            app.extensions["latentdesk.engine"].dispose()


def csrf_from(html: str) -> str:
    match = re.search(r'name="csrf_token"(?: type="hidden")? value="([^"]+)"', html)
    assert match, "no CSRF token in the page"
    return match.group(1)


class Browser:
    """One browser: its own cookie jar and user agent."""

    def __init__(self, base: str, user_agent: str | None = None):
        self.base = base
        self.user_agent = user_agent or f"TestBrowser/{uuid.uuid4().hex[:8]}"
        self.http = requests.Session()
        self.http.headers["User-Agent"] = self.user_agent

    def get(self, path: str, **kwargs) -> requests.Response:
        return self.http.get(self.base + path, allow_redirects=False, timeout=60, **kwargs)

    def post(self, path: str, **kwargs) -> requests.Response:
        return self.http.post(self.base + path, allow_redirects=False, timeout=60, **kwargs)

    def login_token(self) -> str:
        return csrf_from(self.get("/-/login").text)

    def sign_in(self, name: str, password: str, token: str | None = None) -> requests.Response:
        data = {"name": name, "password": password, "csrf_token": token or self.login_token()}
        return self.post("/-/login", data=data)

    def sign_out(self) -> requests.Response:
        """Sign out as the page's button does: a POST carrying the form's CSRF token."""
        token = csrf_from(self.get("/-/logout").text)
        return self.post("/-/logout", data={"csrf_token": token})

    @property
    def cookie(self) -> str | None:
        return self.http.cookies.get(COOKIE)


def replay(base: str, cookie: str, path: str, user_agent: str, **kwargs) -> requests.Response:
    """A request carrying a copied session cookie (and the browser's user agent), nothing else."""
    headers = {"Cookie": f"{COOKIE}={cookie}", "User-Agent": user_agent, **kwargs.pop("headers", {})}
    return requests.get(base + path, headers=headers, allow_redirects=False, timeout=60, **kwargs)
