"""``latentdesk backup`` / ``restore``: a populated site (the demo: datasets, a signed reference
model, checked batches, review and admin log entries) is backed up, its home folder wiped, and
restored into an empty site, on SQLite and on PostgreSQL (pg_dump / pg_restore).

Sources: the review-log chain check is the project's own (docs/design.md, section 6); the
consistency of the copies rests on SQLite's online backup API (sqlite.org, "SQLite Backup
API") and pg_dump's snapshot (PostgreSQL documentation, "pg_dump").
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from analysis.errors import InputError
from webapp.cli import main
from webapp.services import backup as backup_service
from webapp.store import engine_session, make_engine
from webapp.store.engine import database_url, row_counts


def _populated(home: Path, url: str | None) -> dict:
    from webapp.cli import serve

    overrides = {"HOME": str(home), **({"DATABASE_URL": url} if url else {})}
    serve.prepare_demo(overrides)
    return overrides


def _counts(config) -> dict[str, int]:
    engine = make_engine(database_url(config))
    try:
        with engine_session(engine) as session:
            return row_counts(session)
    finally:
        engine.dispose()


def _environment(monkeypatch, config) -> None:
    monkeypatch.setenv("LATENTDESK_HOME", config["HOME"])
    if config.get("DATABASE_URL"):
        monkeypatch.setenv("LATENTDESK_DATABASE_URL", config["DATABASE_URL"])
    else:
        monkeypatch.delenv("LATENTDESK_DATABASE_URL", raising=False)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def two_sites(request, tmp_path):
    """(populated site config, empty site config) on the same kind of database."""
    if request.param == "sqlite":
        return _populated(tmp_path / "site-a", None), {"HOME": str(tmp_path / "site-b")}
    source = request.getfixturevalue("pg_url")
    target = source.rsplit("/", 1)[0] + f"/{source.rsplit('/', 1)[1]}_restored"
    admin = create_engine(request.getfixturevalue("pg_server"), isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{target.rsplit("/", 1)[1]}"'))
    request.addfinalizer(lambda: _drop(admin, target.rsplit("/", 1)[1]))
    return _populated(tmp_path / "site-a", source), {"HOME": str(tmp_path / "site-b"), "DATABASE_URL": target}


def _drop(admin, name: str) -> None:
    with admin.connect() as conn:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    admin.dispose()


def test_backup_wipe_restore_gives_every_row_and_file_back_with_the_chain_intact(two_sites, tmp_path, monkeypatch,
                                                                                  capsys):
    source, target = two_sites
    before = _counts(source)
    assert before["datasets"] == 2 and before["reference_models"] >= 1 and before["review_log"] >= 2
    _environment(monkeypatch, source)
    assert main(["backup", str(tmp_path / "backup")]) == 0
    assert "uploaded file(s)" in capsys.readouterr().out
    manifest = json.loads((tmp_path / "backup" / "manifest.json").read_text())
    assert manifest["counts"] == before and len(manifest["files"]) == 2
    shutil.rmtree(source["HOME"])  # the host's home folder is gone

    _environment(monkeypatch, target)
    assert main(["restore", str(tmp_path / "backup")]) == 0
    out = capsys.readouterr().out
    assert "review log: " in out and "BROKEN" not in out and "DIFFER" not in out
    assert _counts(target) == before
    restored = sorted(p.name for p in (Path(target["HOME"]) / "files").rglob("*") if p.is_file())
    assert restored == sorted(entry["sha256"] for entry in manifest["files"])
    # the restored site serves the same datasets
    from webapp.app import create_app
    from webapp.services import ingest

    app = create_app({"TESTING": True, "SECRET_KEY": "test", **target})
    try:
        with app.app_context():
            names = sorted(d["name"] for d in ingest.list_datasets(None))
            assert len(names) == 2
            first = ingest.list_datasets(None)[0]
            assert ingest.load_table(first["id"]).n_samples == first["n_samples"]
    finally:
        app.extensions["latentdesk.engine"].dispose()


def test_backup_refuses_an_existing_folder_and_leaves_no_partial_folder(tmp_path, monkeypatch):
    config = _populated(tmp_path / "site", None)
    (tmp_path / "taken").mkdir()
    with pytest.raises(InputError, match="exists already"):
        backup_service.backup(config, tmp_path / "taken")

    def killed(*_args, **_kwargs):
        raise KeyboardInterrupt  # stands for a process stopped half-way

    monkeypatch.setattr(backup_service, "_copy_file", killed)
    with pytest.raises(KeyboardInterrupt):
        backup_service.backup(config, tmp_path / "half")
    assert not (tmp_path / "half").exists()
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


def test_restore_checks_everything_before_writing_anything(tmp_path):
    source = _populated(tmp_path / "site-a", None)
    backup_service.backup(source, tmp_path / "backup")
    target = {"HOME": str(tmp_path / "site-b")}
    manifest = json.loads((tmp_path / "backup" / "manifest.json").read_text())
    damaged = tmp_path / "backup" / manifest["files"][0]["path"]
    damaged.write_bytes(damaged.read_bytes() + b"x")
    with pytest.raises(InputError, match=rf"{manifest['files'][0]['path']}: its SHA-256 is .* the backup is damaged"):
        backup_service.restore(target, tmp_path / "backup")
    assert not Path(target["HOME"]).exists()  # nothing written


def test_restore_refuses_a_non_empty_database_and_a_folder_that_is_no_backup(tmp_path, monkeypatch, capsys):
    source = _populated(tmp_path / "site-a", None)
    backup_service.backup(source, tmp_path / "backup")
    before = _counts(source)
    with pytest.raises(InputError, match="is not empty; restore goes into a new, empty one"):
        backup_service.restore(source, tmp_path / "backup")
    assert _counts(source) == before
    (tmp_path / "nothing").mkdir()
    _environment(monkeypatch, {"HOME": str(tmp_path / "site-c")})
    assert main(["restore", str(tmp_path / "nothing")]) == 2
    assert capsys.readouterr().err.strip() == (f"latentdesk: error: {tmp_path / 'nothing'} is not a LatentDesk "
                                                "backup: no manifest.json")
