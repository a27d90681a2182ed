"""Two gunicorn workers, many threads: no lost or duplicated records, one shared cache.

The server is started here (``gunicorn -w 2`` on a free loopback port, against
a temporary home folder, with SQLite and with PostgreSQL). Threads upload distinct files, upload the
same file at once, and ask for the same fit at once. Expected (common practice
for content-addressed stores): every distinct upload is recorded exactly once,
identical uploads resolve to one dataset, and of many simultaneous requests for
one model exactly one fits while the rest hit the cache shared by both workers.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import pytest
import requests
from sqlalchemy import create_engine, func, select

from live_server import prepared_home, running_server
from webapp.store.tables import Dataset, Model
from wine_data import wine_csv, wine_frame

pytestmark = pytest.mark.slow


@pytest.fixture
def server(tmp_path, database_url):
    """(base URL, analyst headers, home folder, database URL) of a two-worker gunicorn server."""
    home = tmp_path / "home"
    users = prepared_home(home, database_url, [("loader", "analyst", "Loader")])
    users["_app"].extensions["latentdesk.engine"].dispose()  # migrated once, before the workers start
    with running_server(home, database_url, threads=2) as base:
        yield base, users["loader"]["headers"], home, database_url


def _upload(base, headers, raw: bytes, name: str) -> dict:
    response = requests.post(f"{base}/api/v1/datasets", files={"file": (name, raw)}, headers=headers, timeout=60)
    assert response.status_code == 201, response.text
    return response.json()["dataset"]


def _fit(base, headers, dataset_id: int, settings: dict) -> dict:
    response = requests.post(f"{base}/api/v1/datasets/{dataset_id}/models", json=settings, headers=headers, timeout=60)
    assert response.status_code == 200, response.text
    return response.json()["model"]


def test_two_workers_lose_nothing_and_share_the_cache(server):
    base, headers, home, database_url = server
    frame = wine_frame()
    distinct = [wine_csv(frame.drop(index=[i])) for i in range(8)]  # eight different files
    same = wine_csv(frame)

    with ThreadPoolExecutor(max_workers=8) as pool:
        distinct_jobs = [pool.submit(_upload, base, headers, raw, f"part-{i}.csv") for i, raw in enumerate(distinct)]
        same_jobs = [pool.submit(_upload, base, headers, same, "wine.csv") for _ in range(6)]
        distinct_sets = [job.result() for job in distinct_jobs]
        same_sets = [job.result() for job in same_jobs]

    assert len({d["id"] for d in distinct_sets}) == 8
    assert len({d["id"] for d in same_sets}) == 1
    assert sum(d["created"] for d in same_sets) == 1
    listed = requests.get(f"{base}/api/v1/datasets", headers=headers, timeout=30).json()["datasets"]
    assert sorted(d["id"] for d in listed) == sorted({d["id"] for d in distinct_sets + same_sets})

    wine_id = same_sets[0]["id"]
    settings = {"scaling": "autoscale", "components": 3}
    with ThreadPoolExecutor(max_workers=8) as pool:
        fits = [job.result() for job in [pool.submit(_fit, base, headers, wine_id, settings) for _ in range(8)]]
        others = [job.result() for job in [pool.submit(_fit, base, headers, d["id"], settings) for d in distinct_sets]]

    assert len({m["fingerprint"] for m in fits}) == 1 and len({m["id"] for m in fits}) == 1
    # One fit for eight simultaneous requests spread over two processes: the cache is shared.
    assert [m["cache_hit"] for m in fits].count(False) == 1
    assert all(m["cache_hit"] is False for m in others)
    assert len({m["fingerprint"] for m in others}) == 8

    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            assert connection.scalar(select(func.count()).select_from(Dataset)) == 9
            assert connection.scalar(select(func.count()).select_from(Model)) == 9
            hashes = connection.execute(select(Dataset.sha256)).scalars().all()
            assert len(hashes) == len(set(hashes)) == 9
    finally:
        engine.dispose()
    stored = [p for p in (home / "files").rglob("*") if p.is_file()]
    assert len(stored) == 9
