"""Engines, sessions and schema migration.

SQLite (the default, ``HOME/latentdesk.db``) runs in WAL mode with foreign keys
on and a busy timeout, so several gunicorn workers can share it. PostgreSQL is
used when ``DATABASE_URL`` names it. The schema is created and upgraded only by
Alembic (``webapp/migrations``), at start-up.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator, Mapping

from sqlalchemy import Engine, create_engine, event, exc
from sqlalchemy.orm import Session, sessionmaker

ENGINE_KEY = "latentdesk.engine"
SESSIONMAKER_KEY = "latentdesk.sessionmaker"
MIGRATIONS = Path(__file__).resolve().parent.parent / "migrations"


def database_url(config: Mapping[str, Any]) -> str:
    """The configured database URL, or SQLite in the home folder."""
    url = config.get("DATABASE_URL")
    if url:
        return str(url)
    return f"sqlite:///{Path(config['HOME']).resolve() / 'latentdesk.db'}"


def _sqlite_pragmas(dbapi_connection, _record) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA busy_timeout=30000")
    cursor.close()


def _remember_pid(_dbapi_connection, record) -> None:
    record.info["pid"] = os.getpid()


def _refuse_inherited(_dbapi_connection, record, proxy) -> None:
    """A connection opened before a fork (a Celery prefork child) is never shared.

    SQLAlchemy docs, "Using Connection Pools with Multiprocessing or os.fork()":
    the pool then discards it and connects afresh in this process.
    """
    if record.info.get("pid") != os.getpid():
        record.dbapi_connection = proxy.dbapi_connection = None
        raise exc.DisconnectionError("connection was opened in another process")


def make_engine(url: str) -> Engine:
    """A new engine for ``url`` with the per-connection settings LatentDesk needs."""
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"timeout": 30})
        event.listen(engine, "connect", _sqlite_pragmas)
    else:
        engine = create_engine(url, pool_pre_ping=True)
    event.listen(engine, "connect", _remember_pid)
    event.listen(engine, "checkout", _refuse_inherited)
    return engine


def get_engine(app_or_url) -> Engine:
    """The app's engine (a Flask app made by ``create_app``) or a new one for a URL."""
    if isinstance(app_or_url, str):
        return make_engine(app_or_url)
    return app_or_url.extensions[ENGINE_KEY]


def _alembic_config(connection):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = connection
    return cfg


def migrate(engine: Engine) -> None:
    """Upgrade the database to the newest schema (no-op when already there)."""
    from alembic import command

    with engine.begin() as connection:
        if connection.dialect.name == "postgresql":
            # Several workers may start at once: one migrates, the others wait.
            connection.exec_driver_sql("SELECT pg_advisory_xact_lock(74657321)")
        command.upgrade(_alembic_config(connection), "head")


def current_revision(engine: Engine) -> str | None:
    """The Alembic revision the database is at (None before the first migration)."""
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def table_names(engine: Engine) -> list[str]:
    """Names of the tables the database holds (any, not only LatentDesk's)."""
    from sqlalchemy import inspect

    return inspect(engine).get_table_names()


def row_counts(session: Session) -> dict[str, int]:
    """Rows per LatentDesk table present in the database (a backup's inventory)."""
    from sqlalchemy import func, select

    from webapp.store.tables import Base

    present = set(table_names(session.get_bind()))
    return {table.name: int(session.execute(select(func.count()).select_from(table)).scalar_one())
            for table in Base.metadata.sorted_tables if table.name in present}


def init_app(app) -> None:
    """Bind an engine and a session factory to ``app`` and migrate the schema."""
    engine = make_engine(database_url(app.config))
    if app.config.get("MIGRATE_ON_START", True):
        migrate(engine)
    app.extensions[ENGINE_KEY] = engine
    app.extensions[SESSIONMAKER_KEY] = sessionmaker(engine, expire_on_commit=False)


def add_and_flush(session: Session, row):
    """Add ``row`` and flush it, so it has its id and constraints are checked; the caller commits."""
    session.add(row)
    session.flush()
    return row


@contextmanager
def _unit_of_work(session: Session) -> Iterator[Session]:
    """Commit ``session`` on success, roll back on error, always close it."""
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


def session_scope(app=None):
    """A session that commits on success and rolls back on error.

    ``app`` defaults to the Flask app of the current application context.
    """
    if app is None:
        from flask import current_app

        app = current_app
    return _unit_of_work(app.extensions[SESSIONMAKER_KEY]())


def engine_session(engine: Engine):
    """Like ``session_scope`` but for a bare engine (CLI, tests)."""
    return _unit_of_work(Session(engine, expire_on_commit=False))
