"""`latentdesk demo` and `latentdesk serve` as a user runs them (real processes).

The demo's printed line format is the contract of issue 4 / docs/design.md section 4.
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

from tests.webapp.conftest import login

LINE = re.compile(r"^user (\S+) \((viewer|analyst|reviewer|admin)\) password (\S+)$")


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _env(home: Path) -> dict:
    env = {k: v for k, v in os.environ.items() if not k.startswith("LATENTDESK_")}
    env["LATENTDESK_HOME"] = str(home)
    return env


def _wait_for_health(url: str, process, seconds: float = 90) -> dict:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise AssertionError(f"server exited with {process.returncode}")
        try:
            with urllib.request.urlopen(url + "/health", timeout=2) as response:
                return json.loads(response.read())
        except OSError:
            time.sleep(0.3)
    raise AssertionError("server did not answer /health")


@pytest.mark.slow
def test_demo_prints_users_binds_loopback_and_serves(tmp_path, app_factory):
    port = _free_port()
    home = tmp_path / "demo"
    process = subprocess.Popen(
        [sys.executable, "-m", "webapp.cli", "demo", "--port", str(port), "--workers", "1"],
        env=_env(home), cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    try:
        lines = []
        while True:
            line = process.stdout.readline()
            assert line, "demo ended before it started serving:\n" + "".join(lines)
            lines.append(line)
            if line.startswith("Listening on"):
                break
        users = [LINE.match(l.rstrip("\n")) for l in lines if l.startswith("user ")]
        assert users and all(users), lines
        assert {m.group(2) for m in users} == {"viewer", "analyst", "reviewer", "admin"}
        assert "127.0.0.1 only" in lines[-1]
        assert _wait_for_health(f"http://127.0.0.1:{port}", process)["database"] == "ok"
        assert (home / "secret_key").exists() and (home / "latentdesk.db").exists()
        # The printed passwords work.
        name, password = users[0].group(1), users[0].group(3)
        app = app_factory(HOME=str(home), DEMO=True)
        assert login(app.test_client(), name, password).status_code == 302
    finally:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()
        process.stdout.close()


def test_serve_without_a_secret_key_says_so(tmp_path):
    result = subprocess.run(
        [sys.executable, "-m", "webapp.cli", "serve", "--port", str(_free_port())],
        env=_env(tmp_path / "home"), capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2
    assert "LATENTDESK_SECRET_KEY is not set" in result.stderr and "Traceback" not in result.stderr


def test_start_up_sweeps_upload_files_no_dataset_records(tmp_path, capsys):
    # A process killed between writing an upload and committing its row leaves a complete but
    # unrecorded file; the next start removes it, sparing files younger than an hour.
    from webapp.cli import serve
    from webapp.store import files

    home = tmp_path / "home"
    stray = files.store_bytes(home, b"sample,x,y\na,1,2\n")
    fresh = files.store_bytes(home, b"sample,x,y\nb,3,4\n")
    old = time.time() - 2 * 3600
    os.utime(files.absolute_path(home, stray.stored_path), (old, old))
    serve._prepare({"HOME": str(home), "SECRET_KEY": "sweep-test"})
    assert not files.absolute_path(home, stray.stored_path).exists()
    assert files.absolute_path(home, fresh.stored_path).exists()
    assert "removed 1 upload file(s)" in capsys.readouterr().out


def test_start_up_forgets_sign_in_attempts_past_their_retention(tmp_path):
    from datetime import timedelta

    from sqlalchemy import select

    from webapp.cli import serve
    from webapp.auth import LOGIN_ATTEMPT_RETENTION
    from webapp.store import engine_session, make_engine, migrate, utcnow
    from webapp.store.engine import database_url
    from webapp.store.tables import LoginAttempt

    home = tmp_path / "home"
    engine = make_engine(database_url({"HOME": str(home)}))
    home.mkdir()
    migrate(engine)
    with engine_session(engine) as s:
        for name, age in (("old", LOGIN_ATTEMPT_RETENTION + timedelta(days=1)), ("recent", timedelta(days=1))):
            s.add(LoginAttempt(name=name, client_addr="127.0.0.1", ok=False, at=utcnow() - age))
    serve._prepare({"HOME": str(home), "SECRET_KEY": "prune-test"})
    with engine_session(engine) as s:
        assert [r.name for r in s.scalars(select(LoginAttempt))] == ["recent"]
    engine.dispose()
