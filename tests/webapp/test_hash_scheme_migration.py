"""Migration 0006_hash_scheme on SQLite and PostgreSQL: an old chain keeps verifying.

The old chain is written here the way the code before 0006 wrote it: SHA-256 (FIPS 180-4) over
``json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False)`` (the legacy
scheme ``ld-json-1``), rows inserted straight into the tables of the revision before 0006.  Its
payloads hold 1e-7, 1e16 and a name outside the Basic Multilingual Plane, where that form and
RFC 8785 (Rundgren, Jordan & Erdtman 2020, sections 3.2.2.3 and 3.2.3) give different bytes,
so the chain verifies only if each entry is recomputed under its recorded scheme.
"""

from __future__ import annotations

import hashlib
import json
from datetime import datetime, timedelta

import pytest
import rfc8785
import sqlalchemy as sa
from alembic import command
from alembic.config import Config
from alembic.script import ScriptDirectory
from sqlalchemy.exc import DBAPIError

from webapp.services import audit
from webapp.store import session_scope
from webapp.store.engine import MIGRATIONS, current_revision, make_engine

REVISION = "0006_hash_scheme"
GENESIS = "0" * 64


def _config(connection=None) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = connection
    return cfg


BEFORE = ScriptDirectory.from_config(_config()).get_revision(REVISION).down_revision

_LOG = sa.table(
    "review_log",
    sa.column("seq", sa.Integer()), sa.column("dataset_id", sa.Integer()), sa.column("at", sa.DateTime()),
    sa.column("actor_id", sa.Integer()), sa.column("actor_name", sa.String()), sa.column("action", sa.String()),
    sa.column("payload", sa.JSON()), sa.column("prev_hash", sa.String()), sa.column("hash", sa.String()),
)


def _migrate(engine, target: str, down: bool = False) -> None:
    with engine.begin() as conn:
        (command.downgrade if down else command.upgrade)(_config(conn), target)


def _legacy_hash(body) -> str:
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _write_old_chain(engine, n: int = 4, tamper_seq: int | None = None) -> list[str]:
    """n entries as the pre-0006 code wrote them; ``tamper_seq``'s stored payload differs from the hashed one."""
    prev, hashes = GENESIS, []
    start = datetime(2026, 3, 1, 9, 30, 0, 250)
    with engine.begin() as conn:
        for seq in range(1, n + 1):
            at = start + timedelta(minutes=seq)
            payload = {"reason": "Grün", "limit": 1e-7 * seq, "big": 1e16, "\ufb33": seq, "\U0001f600": "face"}
            body = {
                "seq": seq, "at": at.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), "actor": {"id": None, "name": "Old App"},
                "action": "note", "dataset_id": None, "payload": payload, "prev_hash": prev,
            }
            digest = _legacy_hash(body)
            assert digest != hashlib.sha256(rfc8785.dumps(body)).hexdigest()  # the schemes differ here
            stored = {**payload, "reason": "edited"} if seq == tamper_seq else payload
            conn.execute(_LOG.insert().values(seq=seq, dataset_id=None, at=at, actor_id=None, actor_name="Old App",
                                              action="note", payload=stored, prev_hash=prev, hash=digest))
            prev = digest
            hashes.append(digest)
        conn.execute(sa.text("UPDATE review_log_head SET seq = :seq, hash = :hash WHERE id = 1"),
                     {"seq": n, "hash": prev})
    return hashes


@pytest.fixture
def old_database(database_url):
    """A database at the revision before 0006, as the older code left it."""
    engine = make_engine(database_url)
    _migrate(engine, BEFORE)
    yield engine
    engine.dispose()


def _columns(engine) -> set[str]:
    return {c["name"] for c in sa.inspect(engine).get_columns("review_log")}


def _schemes(engine) -> list[str]:
    with engine.connect() as conn:
        return list(conn.execute(sa.text("SELECT hash_scheme FROM review_log ORDER BY seq")).scalars())


def test_an_old_chain_verifies_after_the_upgrade_and_grows_under_rfc8785(old_database, app_factory, database_url):
    _write_old_chain(old_database)
    _migrate(old_database, "head")
    assert _schemes(old_database) == ["ld-json-1"] * 4
    app = app_factory(DATABASE_URL=database_url)
    with app.app_context():
        with session_scope() as s:
            assert audit.verify_chain(s) == (True, None, "intact: 4 entries")
        with session_scope() as s:
            audit.append(s, actor_id=None, actor_name="New App", action="note", payload={"limit": 1e-7})
        with session_scope() as s:
            assert audit.verify_chain(s) == (True, None, "intact: 5 entries")
    assert _schemes(old_database) == ["ld-json-1"] * 4 + ["rfc8785"]


def test_the_append_only_guards_hold_after_the_upgrade(old_database):
    _write_old_chain(old_database, n=2)
    _migrate(old_database, "head")
    for statement in ("UPDATE review_log SET hash_scheme = 'rfc8785' WHERE seq = 1",
                      "DELETE FROM review_log WHERE seq = 2"):
        with pytest.raises(DBAPIError):
            with old_database.begin() as conn:
                conn.exec_driver_sql(statement)
    assert _schemes(old_database) == ["ld-json-1"] * 2


@pytest.mark.postgres
def test_a_new_row_must_name_its_scheme_on_postgresql(pg_url):
    """PostgreSQL only: SQLite keeps the column default (dropping it would rebuild the table and
    its triggers), and there ``log verify`` refuses a legacy entry after an rfc8785 one."""
    old_database = make_engine(pg_url)
    try:
        _migrate(old_database, BEFORE)
        _migrate(old_database, "head")
        with pytest.raises(DBAPIError):
            with old_database.begin() as conn:
                conn.exec_driver_sql(
                    "INSERT INTO review_log (seq, at, actor_name, action, payload, prev_hash, hash) "
                    f"VALUES (1, '2026-03-01 10:00:00', 'x', 'note', '{{}}', '{GENESIS}', '{GENESIS}')"
                )
    finally:
        old_database.dispose()


def test_the_upgrade_refuses_a_chain_that_does_not_verify(old_database):
    _write_old_chain(old_database, tamper_seq=3)
    with pytest.raises(RuntimeError, match=r"0006_hash_scheme refused.*first broken entry 3"):
        _migrate(old_database, "head")
    assert current_revision(old_database) == BEFORE
    assert "hash_scheme" not in _columns(old_database)


def test_the_upgrade_refuses_a_log_without_its_chain_head(old_database):
    with old_database.begin() as conn:
        if conn.dialect.name == "sqlite":
            conn.exec_driver_sql("DROP TRIGGER review_log_head_no_delete")
        else:
            conn.exec_driver_sql("SET LOCAL session_replication_role = replica")
        conn.exec_driver_sql("DELETE FROM review_log_head")
    with pytest.raises(RuntimeError, match="no chain head row"):
        _migrate(old_database, "head")
    assert current_revision(old_database) == BEFORE


def test_downgrade_only_while_every_entry_is_legacy(old_database, app_factory, database_url):
    _write_old_chain(old_database, n=2)
    _migrate(old_database, "head")
    _migrate(old_database, BEFORE, down=True)
    assert "hash_scheme" not in _columns(old_database)
    _migrate(old_database, "head")  # the chain still verifies on the way up again
    app = app_factory(DATABASE_URL=database_url)
    with app.app_context(), session_scope() as s:
        audit.append(s, actor_id=None, actor_name="New App", action="note", payload={})
    with pytest.raises(RuntimeError, match="1 review-log entries are hashed under another scheme"):
        _migrate(old_database, BEFORE, down=True)
    assert current_revision(old_database) != BEFORE
