"""The Celery worker's entry point: ``celery -A webapp.worker:celery_app worker``.

It builds the web app once from the environment, so every background callback
is registered as a Celery task, and hands Celery the same application object
the web servers use. It sits at the top of the house beside ``webapp.cli``,
because it imports ``create_app``.
"""

from __future__ import annotations

import os

from webapp.jobs import make_celery


def _worker_celery_app():
    """Build the web app from the environment and return its Celery application."""
    redis_url = os.environ.get("LATENTDESK_REDIS_URL")
    if not redis_url:
        raise RuntimeError("the Celery worker needs LATENTDESK_REDIS_URL")
    from webapp.app import create_app

    create_app()  # registers every background callback on make_celery(redis_url)
    return make_celery(redis_url)


def __getattr__(name: str):
    # PEP 562: `celery -A webapp.worker:celery_app` looks the attribute up here, so
    # importing this module never needs Celery or Redis.
    if name == "celery_app":
        return _worker_celery_app()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
