"""The background-callback manager: diskcache on one host, Celery when Redis is configured.

Source for the two managers and their arguments: Dash documentation, "Background
Callbacks" (dash.plotly.com/background-callbacks).
"""

from __future__ import annotations

import sys

import dash
import pytest

from webapp import jobs, worker


def test_diskcache_manager_lives_in_the_home_cache(tmp_path):
    manager = jobs.make_manager({"HOME": str(tmp_path), "REDIS_URL": None})
    assert isinstance(manager, dash.DiskcacheManager)
    assert (tmp_path / "cache" / "jobs").is_dir()
    # The cache is a real diskcache in that folder: what one worker writes another reads.
    manager.handle.set("probe", 41)
    import diskcache

    assert diskcache.Cache(str(tmp_path / "cache" / "jobs")).get("probe") == 41


def test_redis_url_without_celery_installed_is_a_clear_error(tmp_path, monkeypatch):
    jobs.make_celery.cache_clear()
    monkeypatch.setitem(sys.modules, "celery", None)  # import celery -> ImportError
    with pytest.raises(RuntimeError, match=r"latentdesk\[celery\]"):
        jobs.make_manager({"HOME": str(tmp_path), "REDIS_URL": "redis://127.0.0.1:1/0"})
    jobs.make_celery.cache_clear()


def test_redis_url_gives_a_celery_manager_on_that_broker(tmp_path):
    jobs.make_celery.cache_clear()
    url = "redis://127.0.0.1:1/0"  # never contacted: building the app does not connect
    manager = jobs.make_manager({"HOME": str(tmp_path), "REDIS_URL": url})
    assert isinstance(manager, dash.CeleryManager)
    assert manager.handle.conf.broker_url == url
    # The worker entry point must see the very same Celery app the web app registered tasks on.
    assert jobs.make_celery(url) is manager.handle
    jobs.make_celery.cache_clear()


def test_worker_entry_point_needs_a_redis_url(monkeypatch):
    monkeypatch.delenv("LATENTDESK_REDIS_URL", raising=False)
    with pytest.raises(RuntimeError, match="LATENTDESK_REDIS_URL"):
        worker.celery_app  # noqa: B018 - attribute access runs the worker factory


def test_worker_entry_point_registers_the_background_callbacks(tmp_path, monkeypatch):
    jobs.make_celery.cache_clear()
    monkeypatch.setenv("LATENTDESK_REDIS_URL", "redis://127.0.0.1:1/0")
    monkeypatch.setenv("LATENTDESK_SECRET_KEY", "worker-test")
    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path))
    worker_app = worker.celery_app
    # Dash names each background callback's task "background_callback_<hash>" (dash
    # background_callback/managers/celery_manager.py); the worker must know them.
    assert any(name.startswith("background_callback_") for name in worker_app.tasks)
    assert worker_app is jobs.make_celery("redis://127.0.0.1:1/0")
    jobs.make_celery.cache_clear()


# -- ThreadJobManager: jobs in a thread of the web process, never a forked child ---------

def _manager(tmp_path):
    return jobs.make_manager({"HOME": str(tmp_path), "REDIS_URL": None})


def _wait_until(predicate, timeout=10.0):
    import time

    deadline = time.monotonic() + timeout
    while not predicate():
        assert time.monotonic() < deadline, "the job did not finish in time"
        time.sleep(0.01)


def test_jobs_run_in_a_thread_with_the_starting_apps_context(tmp_path):
    import threading

    import flask
    import psutil

    manager = _manager(tmp_path)
    assert isinstance(manager, jobs.ThreadJobManager)
    release = threading.Event()
    seen = {}

    def callback(label):
        release.wait(10)
        seen["app"] = flask.current_app.name
        seen["thread"] = threading.current_thread().name
        return f"done {label}"

    job_fn = manager.make_job_fn(callback, progress=False)
    app = flask.Flask("starting-app")
    children_before = {p.pid for p in psutil.Process().children()}
    with app.app_context():
        job = manager.call_job_fn("result-key", job_fn, ["A"], {})
    assert {p.pid for p in psutil.Process().children()} == children_before  # no fork
    assert manager.job_running(job)
    release.set()
    _wait_until(lambda: not manager.job_running(job))
    assert manager.get_result("result-key", job) == "done A"
    assert seen == {"app": "starting-app", "thread": f"latentdesk-job-{job}"}


def test_a_failing_job_reports_its_error_and_stops_running(tmp_path):
    manager = _manager(tmp_path)

    def callback():
        raise ValueError("bad settings")

    job = manager.call_job_fn("failing", manager.make_job_fn(callback, progress=False), [], {})
    _wait_until(lambda: not manager.job_running(job))
    result = manager.get_result("failing", job)
    assert result["background_callback_error"]["msg"] == "bad settings"


def test_a_cancelled_job_leaves_no_result(tmp_path):
    import threading

    manager = _manager(tmp_path)
    release = threading.Event()
    job = manager.call_job_fn("cancelled", manager.make_job_fn(lambda: release.wait(10) and "late",
                                                               progress=False), [], {})
    manager.terminate_job(job)  # e.g. the user left the page
    release.set()
    _wait_until(lambda: not manager.job_running(job))
    assert manager.get_result("cancelled", job) is manager.UNDEFINED


def test_a_job_of_a_dead_worker_is_not_running(tmp_path):
    import subprocess

    manager = _manager(tmp_path)
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True).stdout.strip()
    job = f"{gone}-0123abcd"
    manager.handle.set(jobs._running_key(job), True)  # left behind by a killed worker
    assert not manager.job_running(job)
    assert manager.terminate_unhealthy_job(job)
    assert manager.handle.get(jobs._running_key(job)) is None
    assert not manager.job_running("not-a-job-id")


def test_a_cancelled_job_never_removes_the_result_of_a_later_job_with_the_same_inputs(tmp_path):
    # A page rebuilt while its fit runs starts the same fit again and cancels the first; the first
    # finishing last must not delete the second's result (the page would wait for ever).
    import threading

    manager = _manager(tmp_path)
    first_release, second_release = threading.Event(), threading.Event()

    def fit(settings, release):
        release.wait(10)
        return f"fitted {settings}"

    keys = [manager.build_cache_key(fit, ["same settings"], [], None) for _ in range(2)]
    assert keys[0] != keys[1]
    first = manager.call_job_fn(keys[0], manager.make_job_fn(lambda: fit("A", first_release), progress=False), [], {})
    manager.terminate_job(first)
    second = manager.call_job_fn(keys[1], manager.make_job_fn(lambda: fit("A", second_release), progress=False),
                                 [], {})
    second_release.set()
    _wait_until(lambda: not manager.job_running(second))
    first_release.set()
    _wait_until(lambda: not manager.job_running(first))
    assert manager.get_result(keys[1], second) == "fitted A"
    assert manager.get_result(keys[0], first) is manager.UNDEFINED
