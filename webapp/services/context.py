"""Where services find the running app: home folder, cache folder, limits, sessions.

Services are called inside a Flask application context (requests, Dash
callbacks, ``with app.app_context():`` in jobs and tests); these helpers read
the app's config so no service keeps module-level state.
"""

from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from flask import current_app
from sqlalchemy.orm import Session

from webapp.store.engine import session_scope as _session_scope

DEFAULT_MAX_UPLOAD_MB = 200


def home_folder() -> Path:
    """The home folder (``LATENTDESK_HOME``) of the current app."""
    return Path(current_app.config["HOME"]).resolve()


def cache_folder() -> Path:
    """``HOME/cache``, shared by every worker on this host."""
    folder = home_folder() / "cache"
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def max_upload_bytes() -> int:
    """The upload size limit (``LATENTDESK_MAX_UPLOAD_MB``) in bytes."""
    return int(float(current_app.config.get("MAX_UPLOAD_MB") or DEFAULT_MAX_UPLOAD_MB) * 1024**2)


@contextmanager
def session_scope() -> Iterator[Session]:
    """A session of the current app that commits on success, rolls back on error."""
    with _session_scope(current_app) as session:
        yield session
