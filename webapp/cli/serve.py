"""``latentdesk serve`` and ``latentdesk demo``: gunicorn around ``create_app``.

The parent process checks the configuration and migrates the database once;
each gunicorn worker then builds its own app (no state is shared in memory).
The demo prepares its home folder, users and datasets in a separate spawned
process so the server starts with no database handles inherited over fork.
"""

from __future__ import annotations

import multiprocessing
from typing import Any, Mapping

from webapp.services.accounts import user_line
from webapp.auth import LOGIN_ATTEMPT_RETENTION
from webapp.config import load_config
from webapp.store import accounts, datasets, files, make_engine, migrate, utcnow
from webapp.store.engine import database_url, engine_session

# Invented demo accounts: (name, role, printed name).
DEMO_USERS = (
    ("ana", "analyst", "Ana Demo"),
    ("rowan", "reviewer", "Rowan Demo"),
    ("sage", "reviewer", "Sage Demo"),
    ("vic", "viewer", "Vic Demo"),
    ("admin", "admin", "Admin Demo"),
)

DEMO_REFERENCE_MODEL = "Granulate release assays"
DEMO_REFERENCE_NOTE = (
    "Demo: all 150 training batches of the lab scenario, autoscaled, three components "
    "(granulation, degradation, suspension rheology)."
)


def _gunicorn(overrides: Mapping[str, Any], host: str, port: int, workers: int, threads: int):
    from gunicorn.app.base import BaseApplication

    class LatentDeskServer(BaseApplication):
        def load_config(self):
            self.cfg.set("bind", f"{host}:{port}")
            self.cfg.set("workers", workers)
            self.cfg.set("worker_class", "gthread")
            self.cfg.set("threads", threads)
            self.cfg.set("timeout", 300)
            self.cfg.set("accesslog", "-")
            if "control_socket_disable" in self.cfg.settings:  # gunicorn >= 24: unused here,
                self.cfg.set("control_socket_disable", True)  # and shared by every server of a user

        def load(self):
            from webapp.app import create_app

            return create_app(dict(overrides))

    return LatentDeskServer()


def _prepare(overrides: Mapping[str, Any]) -> None:
    """Check the configuration (ConfigError names the problem), migrate once and
    sweep upload files left unrecorded by a killed process and sign-in attempts
    past their retention."""
    config = load_config(overrides)
    engine = make_engine(database_url(config))
    try:
        migrate(engine)
        with engine_session(engine) as session:
            recorded = datasets.all_sha256(session)
            accounts.prune_login_attempts(session, utcnow() - LOGIN_ATTEMPT_RETENTION)
        removed = files.remove_unrecorded(config["HOME"], recorded)
        if removed:
            print(f"removed {len(removed)} upload file(s) that no dataset records", flush=True)
    finally:
        engine.dispose()


def serve(host: str, port: int, workers: int, threads: int = 4, overrides=None) -> None:
    overrides = dict(overrides or {})
    _prepare(overrides)
    print(f"LatentDesk on http://{host}:{port}/ with {workers} worker(s)", flush=True)
    _gunicorn(overrides, host, port, workers, threads).run()


def prepare_demo(overrides: Mapping[str, Any]) -> list[tuple[str, str, str]]:
    """Home folder, secret key, schema, demo users (fresh random passwords), the two
    invented demo datasets and the lab scenario's approved reference model with three
    later weeks checked against it. Returns (name, role, password) per user."""
    from webapp import auth
    from webapp.app import create_app
    from webapp.services.demo_data import lab_scenario, survey_scenario
    from webapp.services.ingest import ingest_upload
    from webapp.store import accounts, session_scope

    app = create_app({**overrides, "DEMO": True})
    handed_out = []
    with app.app_context():
        with session_scope() as s:
            for name, role, printed in DEMO_USERS:
                password = auth.generate_password()
                auth.check_new_password(password, name)
                user = accounts.get_user_by_name(s, name)
                if user is None:
                    accounts.add_user(s, name, role, auth.hash_password(password), printed)
                else:
                    accounts.set_password(s, user, auth.hash_password(password))
                    accounts.set_active(s, user, True)
                    auth.sessions.revoke_user_sessions(s, user.id, auth.sessions.PASSWORD_CHANGED)
                handed_out.append((name, role, password))
            owner = accounts.get_user_by_name(s, "ana").id
        made = [ingest_upload(raw, filename, owner) for filename, raw in (lab_scenario(), survey_scenario())]
        passwords = {name: password for name, _, password in handed_out}
        _demo_monitoring(made[0]["id"], passwords["rowan"])
    return handed_out


def _demo_user(name: str):
    from webapp.auth import CurrentUser
    from webapp.store import accounts, session_scope

    with session_scope() as s:
        row = accounts.get_user_by_name(s, name)
        return CurrentUser(id=row.id, name=row.name, display_name=row.display_name, role=row.role)


def _demo_monitoring(lab_dataset_id: int, reviewer_password: str) -> None:
    """The lab scenario's reference model, proposed by ``ana`` and approved by ``rowan`` through
    the services (the reviewer re-enters the password, as in the browser), and its three later weeks checked
    against it (``demo_data.lab_later_batches``). Skipped when the demo home has it already."""
    from webapp.services import batches, modelling
    from webapp.services import reference_models as reference
    from webapp.services.demo_data import lab_later_batches

    if reference.list_reference_models(states=["approved"], name=DEMO_REFERENCE_MODEL):
        return
    analyst, reviewer = _demo_user("ana"), _demo_user("rowan")
    _, fitted = modelling.get_model(lab_dataset_id, {"components": 3}, user_id=analyst.id)
    proposed = reference.propose(fitted["id"], DEMO_REFERENCE_MODEL, DEMO_REFERENCE_NOTE, user=analyst)
    reference.approve(proposed["id"], reviewer_password, "Three components, limits at 95 % and 99 %; "
                      "fit reviewed on the score and loading plots.", user=reviewer)
    for filename, raw in lab_later_batches():
        batches.check_batch(proposed["id"], raw, filename, analyst)


def _prepare_demo_child(overrides: dict, queue) -> None:
    queue.put(prepare_demo(overrides))


def demo(host: str, port: int, workers: int, overrides=None) -> None:
    overrides = {**(overrides or {}), "DEMO": True}
    context = multiprocessing.get_context("spawn")
    queue = context.SimpleQueue()
    child = context.Process(target=_prepare_demo_child, args=(overrides, queue))
    child.start()
    child.join()
    if child.exitcode != 0 or queue.empty():
        raise RuntimeError("preparing the demo failed (see the message above)")
    config = load_config(overrides)
    print(f"LatentDesk demo in {config['HOME']}")
    for name, role, password in queue.get():
        print(user_line(name, role, password))
    if host == "127.0.0.1":
        print(f"Listening on 127.0.0.1 only (this computer): http://127.0.0.1:{port}/ "
              "- pass --host 0.0.0.0 to let other computers connect.", flush=True)
    else:
        print(f"Listening on {host}:{port} as asked with --host: anyone who can reach this "
              "address can open the sign-in page.", flush=True)
    serve(host, port, workers, overrides=overrides)
