"""A real LatentDesk server for tests and benchmarks: gunicorn with two workers.

``prepared_home(home, database_url, users)`` migrates the database and adds users
(cheap scrypt cost, tokens), ``running_server(home, database_url)`` starts
``gunicorn -w 2`` on a free loopback port and stops it afterwards.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from contextlib import contextmanager
from pathlib import Path

import requests
from werkzeug.security import generate_password_hash

ROOT = Path(__file__).resolve().parents[2]
FAST_HASH = "scrypt:1024:8:1"


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _config(home: Path, database_url: str | None) -> dict:
    config = {"SECRET_KEY": "live-server-test", "HOME": str(home)}
    if database_url:
        config["DATABASE_URL"] = database_url
    return config


def prepared_home(home: Path, database_url: str | None, users: list[tuple[str, str, str]]) -> dict:
    """Migrate, add ``(name, role, display name)`` users; return name -> {id, password, headers}."""
    from webapp import auth
    from webapp.app import create_app
    from webapp.store import accounts, session_scope

    app = create_app(_config(home, database_url))
    made = {}
    with app.app_context(), session_scope() as s:
        for name, role, display in users:
            password = f"pw-{name}-secret"
            user = accounts.add_user(s, name, role, generate_password_hash(password, method=FAST_HASH), display)
            token = auth.create_token(s, user.id, "live")
            made[name] = {"id": user.id, "password": password, "display_name": display,
                          "headers": {"Authorization": f"Bearer {token}"}}
    made["_app"] = app
    return made


@contextmanager
def running_server(home: Path, database_url: str | None, workers: int = 2, threads: int = 4):
    port = free_port()
    env = {**os.environ, "LATENTDESK_HOME": str(home), "LATENTDESK_SECRET_KEY": "live-server-test",
           "PYTHONPATH": str(ROOT)}
    env.pop("LATENTDESK_REDIS_URL", None)
    if database_url:
        env["LATENTDESK_DATABASE_URL"] = database_url
    else:
        env.pop("LATENTDESK_DATABASE_URL", None)
    process = subprocess.Popen(
        [sys.executable, "-m", "gunicorn", "-w", str(workers), "--threads", str(threads), "-k", "gthread",
         "-b", f"127.0.0.1:{port}", "--timeout", "120", "--log-level", "warning", "webapp.app:create_app()"],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                if requests.get(f"{base}/health", timeout=5).status_code == 200:
                    break
            except requests.RequestException:  # not listening yet, or still loading the app
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                output = process.stdout.read().decode(errors="replace") if process.poll() is not None else ""
                raise RuntimeError(f"gunicorn did not start: {output[-2000:]}")
            time.sleep(0.2)
        yield base
    finally:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


def insert_proposals(app, dataset_id: int, proposer_id: int, proposer_name: str, count: int) -> list[int]:
    """Open proposals stored directly through the store (no model fit needed), each logged."""
    from webapp.services import audit
    from webapp.store import review as store
    from webapp.store import session_scope

    ids = []
    with app.app_context():
        for k in range(count):
            with session_scope() as s:
                store.lock_review(s)
                row = store.insert_proposal(
                    s, dataset_id=dataset_id, action="exclude", samples=[f"S{k:03d}"],
                    reason_category="other", reason=f"load test {k}", proposed_by=proposer_id,
                    created_at=audit.now_utc(), state="proposed", comparison=None,
                )
                audit.append(s, actor_id=proposer_id, actor_name=proposer_name, action="propose",
                             dataset_id=dataset_id, payload={"proposal_id": row.id, "samples": [f"S{k:03d}"]})
                ids.append(row.id)
    return ids


def insert_dataset(app, uploader_id: int) -> int:
    """A dataset row to hang proposals on (the bytes are not needed by the sign-off path).

    It counts 100 samples, so approving the load-test exclusions (S000, S001, ...) leaves
    enough for a model (an approval is re-checked against the sample count).
    """
    from webapp.store import datasets, session_scope

    with app.app_context(), session_scope() as s:
        row = datasets.insert_dataset(
            s, sha256="0" * 63 + "1", name="load-test.csv", stored_path="00/none", size_bytes=0,
            id_column="sample", sheet=None, intake_options={}, n_samples=100, n_variables=0,
            variables=[], metadata_columns=[], warnings=[], report={}, uploaded_by=uploader_id,
        )
        return row.id
