"""Uploads as a service: content-addressed storage, one unit of work, re-reading.

Checks against outside facts: SHA-256 from Python's hashlib (FIPS 180-4), the
wine data's published shape (178 x 13; scikit-learn ``load_wine`` docs) and its
values as scikit-learn ships them.
"""

from __future__ import annotations

import hashlib
import os
import shutil

import numpy as np
import pytest
from sqlalchemy import func, select

from analysis.errors import InputError
from analysis.intake import IntakeError
from webapp.services import ingest
from webapp.store import accounts, session_scope
from webapp.store.tables import Dataset
from wine_data import variables, wine_csv, wine_frame


@pytest.fixture
def uploader(app, make_user):
    name, _ = make_user("analyst")
    with app.app_context(), session_scope() as s:
        return accounts.get_user_by_name(s, name).id


def _stored_files(app) -> list[str]:
    root = os.path.join(app.config["HOME"], "files")
    return sorted(
        os.path.relpath(os.path.join(folder, f), root)
        for folder, _, names in os.walk(root)
        for f in names
    )


def _dataset_count(app) -> int:
    with app.app_context(), session_scope() as s:
        return s.scalar(select(func.count()).select_from(Dataset))


def test_upload_is_stored_under_its_sha256(app, uploader):
    raw = wine_csv()
    digest = hashlib.sha256(raw).hexdigest()
    with app.app_context():
        dataset = ingest.ingest_upload(raw, "wine.csv", uploader)
    assert dataset["sha256"] == digest
    assert dataset["created"] is True
    # load_wine: 178 samples, 13 numeric variables (scikit-learn documentation).
    assert (dataset["n_samples"], dataset["n_variables"]) == (178, 13)
    assert dataset["variables"] == variables()
    assert dataset["metadata_columns"] == ["cultivar"]
    assert _stored_files(app) == [f"{digest[:2]}/{digest}"]
    path = os.path.join(app.config["HOME"], "files", digest[:2], digest)
    with open(path, "rb") as handle:
        assert handle.read() == raw


def test_same_bytes_same_options_return_the_existing_dataset(app, uploader):
    raw = wine_csv()
    with app.app_context():
        first = ingest.ingest_upload(raw, "wine.csv", uploader)
        again = ingest.ingest_upload(raw, "another name.csv", uploader)
    assert again["id"] == first["id"] and again["created"] is False
    assert again["name"] == "wine.csv"
    assert _dataset_count(app) == 1 and len(_stored_files(app)) == 1


def test_other_options_make_another_dataset_sharing_the_file(app, uploader):
    raw = wine_csv()
    with app.app_context():
        first = ingest.ingest_upload(raw, "wine.csv", uploader)
        other = ingest.ingest_upload(raw, "wine.csv", uploader, roles={"magnesium": "ignore"})
    assert other["id"] != first["id"] and other["created"] is True
    assert "magnesium" not in other["variables"] and other["n_variables"] == 12
    assert _dataset_count(app) == 2 and len(_stored_files(app)) == 1


@pytest.mark.parametrize(
    "client_name, shown",
    [
        ("../../etc/passwd.csv", "passwd.csv"),
        ("C:\\Users\\someone\\wine.csv", "wine.csv"),
        ("", "upload"),
    ],
)
def test_client_file_names_are_display_text_only(app, uploader, client_name, shown):
    raw = wine_csv()
    with app.app_context():
        dataset = ingest.ingest_upload(raw, client_name, uploader)
        info = ingest.dataset_info(dataset["id"])
    assert dataset["name"] == shown
    digest = hashlib.sha256(raw).hexdigest()
    assert info["stored_path"] == f"files/{digest[:2]}/{digest}"


def test_load_table_gives_back_the_uploaded_values(app, uploader):
    frame = wine_frame()
    with app.app_context():
        dataset = ingest.ingest_upload(wine_csv(frame), "wine.csv", uploader)
        table = ingest.load_table(dataset["id"])
        cached = ingest.load_table(dataset["id"])
    expected = frame.set_index("sample")[variables()]
    assert table.sample_ids == list(expected.index)
    np.testing.assert_array_equal(table.values, expected.to_numpy(dtype=float))
    assert list(table.metadata["cultivar"]) == list(frame["cultivar"])
    np.testing.assert_array_equal(cached.values, table.values)


def test_a_damaged_stored_file_is_reported_not_read(app, uploader):
    raw = wine_csv()
    with app.app_context():
        dataset = ingest.ingest_upload(raw, "wine.csv", uploader)
        path = ingest.blob_path(dataset["sha256"])
        path.write_bytes(raw.replace(b"W-001", b"W-999"))
        shutil.rmtree(os.path.join(app.config["HOME"], "cache", ingest.TABLE_CACHE_FOLDER))  # a cold cache
        with pytest.raises(RuntimeError, match="does not match its SHA-256"):
            ingest.load_table(dataset["id"])


def test_unknown_dataset_is_not_found(app):
    with app.app_context(), pytest.raises(ingest.DatasetNotFound):
        ingest.load_table(12345)


def test_preview_stores_nothing(app):
    with app.app_context():
        preview = ingest.preview_upload(wine_csv(), "wine.csv")
    assert preview["n_samples"] == 178 and preview["file_type"] == "csv"
    assert _dataset_count(app) == 0 and _stored_files(app) == []


def test_a_file_intake_refuses_changes_nothing(app, uploader):
    raw = b"sample,a,b\nS1,1,2\nS1,3,4\nS2,5,6\nS3,7,8\n"  # S1 twice
    with pytest.raises(IntakeError) as expected:
        from analysis.intake import read_table

        read_table(raw, "dupes.csv", id_column="sample")
    with app.app_context(), pytest.raises(InputError) as got:
        ingest.ingest_upload(raw, "dupes.csv", uploader, id_column="sample")
    assert str(got.value) == str(expected.value)
    assert _dataset_count(app) == 0 and _stored_files(app) == []


def test_orphan_files_are_swept(app, uploader):
    with app.app_context():
        kept = ingest.ingest_upload(wine_csv(), "wine.csv", uploader)
        from webapp.store import files

        orphan = files.store_bytes(app.config["HOME"], b"left behind by a killed worker")
        removed = ingest.remove_orphan_files(min_age_seconds=0)
    assert removed == [orphan.sha256]
    assert _stored_files(app) == [f"{kept['sha256'][:2]}/{kept['sha256']}"]


def test_upload_dedup_and_fit_on_both_engines(app_factory, database_url, tmp_path):
    """The same unit of work on SQLite and PostgreSQL (JSON options compared in Python)."""
    from webapp.services import modelling

    app = app_factory(DATABASE_URL=database_url, HOME=str(tmp_path / "engine-home"))
    with app.app_context():
        with session_scope() as s:
            from werkzeug.security import generate_password_hash

            uid = accounts.add_user(s, "engine", "analyst", generate_password_hash("x" * 12, method="scrypt:1024:8:1")).id
        first = ingest.ingest_upload(wine_csv(), "wine.csv", uid, roles={"ash": "ignore"})
        again = ingest.ingest_upload(wine_csv(), "wine.csv", uid, roles={"ash": "ignore"})
        _, fitted = modelling.get_model(first["id"], {"components": 2}, user_id=uid)
        _, hit = modelling.get_model(first["id"], {"components": 2}, user_id=uid)
    assert again["id"] == first["id"] and again["created"] is False
    assert fitted["id"] == hit["id"] and hit["cache_hit"] is True
    assert "ash" not in fitted["variables"]
