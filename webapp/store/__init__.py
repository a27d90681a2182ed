"""The only place SQL lives: tables, engine/session setup and named queries.

Use ``session_scope()`` inside a request (or an app context) and the small
query functions of ``accounts``, ``catalog`` (and ``review``); nothing outside
this package builds SQL.
"""

from webapp.store.engine import (
    current_revision,
    database_url,
    engine_session,
    get_engine,
    init_app,
    make_engine,
    migrate,
    session_scope,
)
from webapp.store.types import utcnow

__all__ = [
    "current_revision",
    "database_url",
    "engine_session",
    "get_engine",
    "init_app",
    "make_engine",
    "migrate",
    "session_scope",
    "utcnow",
]
