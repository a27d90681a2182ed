"""Background jobs: the manager behind Dash background callbacks.

One host: a ``dash.DiskcacheManager`` on the home folder's cache (every gunicorn
worker opens the same SQLite-backed cache, so a job started by one worker is
seen by the others). Several hosts: a ``dash.CeleryManager`` on Redis when
``LATENTDESK_REDIS_URL`` is set; start the worker with

    celery -A webapp.jobs:celery_app worker

which builds the web app once (so every background callback is registered as a
Celery task) and hands Celery the same application object the web server uses.

References: Dash documentation, "Background Callbacks" (dash.plotly.com).
"""

from __future__ import annotations

import os
from functools import lru_cache
from pathlib import Path
from typing import Any, Mapping

JOB_CACHE_FOLDER = "jobs"


def _redis_url(config: Mapping[str, Any]) -> str | None:
    return config.get("REDIS_URL") or None


def job_cache_path(config: Mapping[str, Any]) -> Path:
    """Folder of the diskcache that holds background-job state and results."""
    return Path(config["HOME"]) / "cache" / JOB_CACHE_FOLDER


@lru_cache(maxsize=None)
def make_celery(redis_url: str):
    """The Celery application for ``redis_url`` (one per process and URL).

    Memoised so that the web app and the worker entry point share one object:
    Dash registers each background callback as a task on it.
    """
    try:
        from celery import Celery
    except ImportError as exc:
        raise RuntimeError(
            "LATENTDESK_REDIS_URL is set but Celery is not installed; "
            "install the extra with: pip install 'latentdesk[celery]'"
        ) from exc
    app = Celery("latentdesk", broker=redis_url, backend=redis_url)
    app.conf.update(task_track_started=True, result_expires=24 * 3600)
    return app


def make_manager(config: Mapping[str, Any]):
    """The background-callback manager for this configuration.

    Parameters
    ----------
    config : mapping
        The app config: ``HOME`` (home folder) and optionally ``REDIS_URL``.

    Returns
    -------
    dash.CeleryManager when ``REDIS_URL`` is set, else dash.DiskcacheManager
    on ``HOME/cache/jobs``.
    """
    import dash

    redis_url = _redis_url(config)
    if redis_url:
        return dash.CeleryManager(make_celery(redis_url))
    import diskcache

    folder = job_cache_path(config)
    folder.mkdir(parents=True, exist_ok=True)
    return dash.DiskcacheManager(diskcache.Cache(str(folder)))


def _worker_celery_app():
    """Build the web app from the environment and return its Celery application."""
    redis_url = os.environ.get("LATENTDESK_REDIS_URL")
    if not redis_url:
        raise RuntimeError("the Celery worker needs LATENTDESK_REDIS_URL")
    from webapp import create_app

    create_app()  # registers every background callback on make_celery(redis_url)
    return make_celery(redis_url)


def __getattr__(name: str):
    # PEP 562: `celery -A webapp.jobs:celery_app` looks the attribute up here, so
    # importing this module never needs Celery or Redis.
    if name == "celery_app":
        return _worker_celery_app()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
