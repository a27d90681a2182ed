"""Background jobs: the manager behind Dash background callbacks.

One host: ``ThreadJobManager``, a ``dash.DiskcacheManager`` on the home folder's
cache (every gunicorn worker opens the same SQLite-backed cache, so a job
started by one worker is seen by the others) whose jobs run in a thread of the
web process instead of a forked child. Several hosts: a ``dash.CeleryManager``
on Redis when ``LATENTDESK_REDIS_URL`` is set; start the worker with

    celery -A webapp.worker:celery_app worker

(``webapp.worker`` builds the web app once, so every background callback is
registered as a Celery task.)

References: Dash documentation, "Background Callbacks" (dash.plotly.com).
"""

from __future__ import annotations

import os
import threading
import uuid
from contextlib import nullcontext
from functools import lru_cache
from pathlib import Path
from typing import Any, Mapping

import dash
import flask

JOB_CACHE_FOLDER = "jobs"
JOB_STATE_EXPIRE_S = 24 * 3600  # a worker killed mid-job must not leave its keys forever


class ThreadJobManager(dash.DiskcacheManager):
    """Dash's diskcache manager with each job run in a thread of the web process.

    Dash's own manager forks the web process for every job. The web process has
    other threads (gunicorn's gthread workers, the threaded development server),
    and a fork copies the locks they hold at that instant: a job child was seen
    waiting forever on SQLite's allocator mutex, so the page waited forever too
    (POSIX.1-2017, fork(): "A process shall be created with a single thread";
    the Python 3.12 documentation of ``os.fork`` warns against forking a
    multi-threaded process). A thread has no such hazard, and numpy's LAPACK
    calls release the GIL, so a fit does not stall the worker's other requests.

    Job ids are ``"<worker pid>-<random hex>"``; a ``running`` key in the shared
    cache, checked together with the worker's pid, lets any worker on the host
    answer a poll. A thread cannot be stopped, so cancelling marks the job and
    its result is thrown away when it finishes. The job runs in a fresh app
    context of the Flask app that started it.
    """

    def build_cache_key(self, fn, args, cache_args_to_ignore, triggered):
        """Dash's key plus a random suffix: one result slot per job. Two jobs started with the
        same inputs (a page rebuilt while its first fit ran) would otherwise share a slot, and
        the cancelled one, finishing last, would delete the other's result, leaving the page
        waiting for a fit that never arrives. Results are read once (no ``cache_by``), so no
        memoisation is lost."""
        return f"{super().build_cache_key(fn, args, cache_args_to_ignore, triggered)}-{uuid.uuid4().hex}"

    def call_job_fn(self, key, job_fn, args, context):
        job = f"{os.getpid()}-{uuid.uuid4().hex}"
        app = flask.current_app._get_current_object() if flask.has_app_context() else None
        self.handle.set(_running_key(job), True, expire=JOB_STATE_EXPIRE_S)
        threading.Thread(target=self._run, args=(app, job, key, job_fn, args, context),
                         name=f"latentdesk-job-{job}", daemon=True).start()
        return job

    def _run(self, app, job, key, job_fn, args, context) -> None:
        try:
            with app.app_context() if app is not None else nullcontext():
                job_fn(key, self._make_progress_key(key), args, context)
        finally:
            if self.handle.pop(_cancelled_key(job), default=None):
                self.clear_cache_entry(key)
                self.clear_cache_entry(self._make_progress_key(key))
            self.handle.delete(_running_key(job))

    def job_running(self, job) -> bool:
        import psutil

        if not job or self.handle.get(_running_key(job)) is None:
            return False
        return psutil.pid_exists(_worker_pid(job))  # a dead worker's jobs died with it

    def terminate_job(self, job) -> None:
        if job and self.job_running(job):
            self.handle.set(_cancelled_key(job), True, expire=JOB_STATE_EXPIRE_S)

    def terminate_unhealthy_job(self, job) -> bool:
        if job and self.handle.get(_running_key(job)) is not None and not self.job_running(job):
            self.handle.delete(_running_key(job))
            return True
        return False


def _running_key(job) -> str:
    return f"latentdesk-job-running-{job}"


def _cancelled_key(job) -> str:
    return f"latentdesk-job-cancelled-{job}"


def _worker_pid(job) -> int:
    try:
        return int(str(job).split("-", 1)[0])
    except ValueError:
        return -1


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
    dash.CeleryManager when ``REDIS_URL`` is set, else a ThreadJobManager
    on ``HOME/cache/jobs``.
    """
    redis_url = _redis_url(config)
    if redis_url:
        return dash.CeleryManager(make_celery(redis_url))
    import diskcache

    folder = job_cache_path(config)
    folder.mkdir(parents=True, exist_ok=True)
    return ThreadJobManager(diskcache.Cache(str(folder)))


def app_context():
    """The Flask app context a background job needs outside a request.

    ``ThreadJobManager`` pushes the starting app's context itself; a Celery
    worker has the one app it built (``webapp.worker``).
    """
    if flask.has_app_context():
        return nullcontext()
    return dash.get_app().server.app_context()
