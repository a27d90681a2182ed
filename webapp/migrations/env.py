"""Alembic environment: migrations run on the connection LatentDesk hands over.

``webapp.store.migrate(engine)`` passes its connection in
``config.attributes["connection"]``; run from the ``alembic`` command line the
database comes from the LatentDesk configuration (``LATENTDESK_*``).
"""

from alembic import context

from webapp.store.tables import Base

target_metadata = Base.metadata


def _run(connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = context.config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    from webapp.config import load_config
    from webapp.store.engine import database_url, make_engine

    engine = make_engine(database_url(load_config(require_secret=False)))
    with engine.begin() as connection:
        _run(connection)


if context.is_offline_mode():
    raise SystemExit("LatentDesk migrations run online only (webapp.store.migrate)")
run_migrations_online()
