"""The background-callback manager: diskcache on one host, Celery when Redis is configured.

Source for the two managers and their arguments: Dash documentation, "Background
Callbacks" (dash.plotly.com/background-callbacks).
"""

from __future__ import annotations

import sys

import dash
import pytest

from webapp import jobs


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
        jobs.celery_app  # noqa: B018 - attribute access runs the worker factory


def test_worker_entry_point_registers_the_background_callbacks(tmp_path, monkeypatch):
    jobs.make_celery.cache_clear()
    monkeypatch.setenv("LATENTDESK_REDIS_URL", "redis://127.0.0.1:1/0")
    monkeypatch.setenv("LATENTDESK_SECRET_KEY", "worker-test")
    monkeypatch.setenv("LATENTDESK_HOME", str(tmp_path))
    worker_app = jobs.celery_app
    # Dash names each background callback's task "background_callback_<hash>" (dash
    # background_callback/managers/celery_manager.py); the worker must know them.
    assert any(name.startswith("background_callback_") for name in worker_app.tasks)
    assert worker_app is jobs.make_celery("redis://127.0.0.1:1/0")
    jobs.make_celery.cache_clear()
