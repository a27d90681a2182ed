"""Bad uploads and crashes leave nothing behind.

A refused upload answers 400 (413 when too large; RFC 9110 sections 15.5.1 and
15.5.14) with intake's own message, and leaves no dataset row and no stored
file. A crash between writing the file and committing the row leaves no half
dataset: the row is never visible and the file is removed (or, after a hard
kill, swept as an orphan).
"""

from __future__ import annotations

import io
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from sqlalchemy import func, select

from analysis.intake import IntakeError, read_table
from webapp.services import ingest
from webapp.store import datasets as store
from webapp.store import session_scope
from webapp.store.tables import Dataset
from wine_data import wine_csv

ROOT = Path(__file__).resolve().parents[2]
PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 64

BAD_FILES = [
    pytest.param(b"", "empty.csv", {}, id="empty"),
    pytest.param(b"   \n\n", "blank.csv", {}, id="only-whitespace"),
    pytest.param(PNG, "picture.csv", {}, id="png-named-csv"),
    pytest.param(b"not a zip at all", "book.xlsx", {}, id="fake-xlsx"),
    pytest.param(b"sample,a,b\nS1,1,2\nS1,3,4\nS2,5,6\nS3,7,8\n", "dupes.csv", {"id_column": "sample"}, id="duplicate-ids"),
    pytest.param(b"sample,a,b\nS1,1,2\nS2,3,4\nS3,5,6\n", "ids.csv", {"id_column": "batch"}, id="unknown-id-column"),
    pytest.param(b"sample,a,b\nS1,1,2\nS2,3,4\nS3,5,6\n", "sheet.csv", {"sheet": "Sheet9"}, id="sheet-on-csv"),
    pytest.param(b"sample,a,b\nS1,1,2\nS2,oops,4\nS3,5,6\nS4,7,9\n", "cells.csv", {"bad_cells": "error"}, id="text-in-numbers"),
    pytest.param(b"sample,a\nS1,1\nS2,2\nS3,3\n", "opts.csv", {"below_limit": "third"}, id="unknown-policy"),
]


def _upload(client, headers, raw: bytes, name: str, **fields):
    return client.post(
        "/api/v1/datasets",
        data={"file": (io.BytesIO(raw), name), **fields},
        headers=headers,
        content_type="multipart/form-data",
    )


def _nothing_stored(app) -> None:
    with app.app_context(), session_scope() as s:
        assert s.scalar(select(func.count()).select_from(Dataset)) == 0
    root = Path(app.config["HOME"]) / "files"
    assert not root.exists() or [p for p in root.rglob("*") if p.is_file()] == []


@pytest.mark.parametrize("raw, name, fields", BAD_FILES)
def test_bad_upload_is_400_with_intake_message_and_stores_nothing(app, client, auth, raw, name, fields):
    with pytest.raises(IntakeError) as intake:
        read_table(raw, name, **fields)
    response = _upload(client, auth.token("analyst"), raw, name, **fields)
    body = response.get_json()
    assert response.status_code == 400, body
    assert body == {"ok": False, "error": {"code": "bad_input", "message": str(intake.value)}}
    _nothing_stored(app)


def test_missing_file_field_is_400(app, client, auth):
    response = client.post(
        "/api/v1/datasets", data={"id_column": "x"}, headers=auth.token("analyst"), content_type="multipart/form-data"
    )
    assert response.status_code == 400 and "'file'" in response.get_json()["error"]["message"]
    _nothing_stored(app)


@pytest.mark.parametrize(
    "n_rows",
    [
        pytest.param(80_000, id="file-over-limit"),  # ~1.6 MB: body within the request cap, file over 1 MB
        pytest.param(200_000, id="body-over-request-cap"),  # ~4 MB: refused while the body is read
    ],
)
def test_too_large_is_413_and_stores_nothing(app_factory, n_rows):
    from tests.webapp.conftest import AuthActions

    app = app_factory(MAX_UPLOAD_MB=1)
    client = app.test_client()
    headers = AuthActions(app, client).token("analyst")
    rows = b"".join(b"S%07d,%d,%d\n" % (i, i, i * 2) for i in range(n_rows))
    response = _upload(client, headers, b"sample,a,b\n" + rows, "big.csv")
    body = response.get_json()
    assert response.status_code == 413 and body["error"]["code"] == "too_large"
    assert "1 MB" in body["error"]["message"]
    _nothing_stored(app)


def test_crash_between_file_write_and_commit_leaves_no_half_dataset(app, client, auth, monkeypatch):
    headers = auth.token("analyst")
    real_insert = store.insert_dataset
    seen = {}

    def insert_then_crash(session, **fields):
        real_insert(session, **fields)  # row flushed, file already written
        seen["path"] = Path(app.config["HOME"]) / fields["stored_path"]
        seen["written"] = seen["path"].exists()
        raise RuntimeError("simulated crash before commit")

    monkeypatch.setattr(store, "insert_dataset", insert_then_crash)
    with pytest.raises(RuntimeError, match="simulated crash"):
        _upload(client, headers, wine_csv(), "wine.csv")
    assert seen["written"] is True  # the crash really came after the file write
    _nothing_stored(app)
    monkeypatch.setattr(store, "insert_dataset", real_insert)
    retry = _upload(client, headers, wine_csv(), "wine.csv")
    assert retry.status_code == 201 and retry.get_json()["dataset"]["created"] is True


def test_hard_kill_before_commit_leaves_no_dataset(app, tmp_path):
    """A worker killed outright (os._exit, no clean-up) after the file write."""
    script = textwrap.dedent(
        f"""
        import os
        from webapp.app import create_app
        from webapp.services import ingest
        from webapp.store import accounts, datasets, session_scope
        from werkzeug.security import generate_password_hash

        app = create_app({{"SECRET_KEY": "k", "HOME": {app.config["HOME"]!r}}})
        with app.app_context():
            with session_scope() as s:
                uid = accounts.add_user(s, "killed", "analyst", generate_password_hash("x" * 12)).id
            real = datasets.insert_dataset

            def die(session, **fields):
                real(session, **fields)
                os._exit(9)

            datasets.insert_dataset = die
            ingest.ingest_upload(open({str(tmp_path / "wine.csv")!r}, "rb").read(), "wine.csv", uid)
        """
    )
    (tmp_path / "wine.csv").write_bytes(wine_csv())
    done = subprocess.run(
        [sys.executable, "-c", script], cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)},
        capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 9, done.stderr
    with app.app_context():
        with session_scope() as s:
            assert s.scalar(select(func.count()).select_from(Dataset)) == 0
        # The file is complete but unlisted; housekeeping removes it.
        assert ingest.remove_orphan_files(min_age_seconds=0) != []
    _nothing_stored(app)
