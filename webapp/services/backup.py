"""Backup and restore of a site: its database and its uploaded files, never the derived cache.

``backup(folder)`` writes ``manifest.json``, the database and ``files/`` into a hidden
``.<name>.partial-*`` folder beside ``folder`` and renames it to ``folder`` only when all is
written and checked, so a backup killed half-way never leaves a folder that looks complete.
The database is copied consistently while the site runs: SQLite through its online backup
API (Python's ``sqlite3.Connection.backup``), PostgreSQL by ``pg_dump --format=custom``
(PostgreSQL documentation, "pg_dump": a consistent snapshot, readers and writers not
blocked). The fit cache is left out: any host rebuilds it from the fingerprints.

``restore(folder)`` first checks the manifest, the database copy and every file against
their SHA-256 and refuses a target database that already holds LatentDesk tables; only then
does it write (SQLite: a temporary file renamed into place; PostgreSQL: ``pg_restore`` into the
empty database; files: temporary file, then ``os.replace``). Afterwards it verifies the review
and admin log chains, compares the review-log head and the row count of every table with the
manifest, and reports what it found.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import subprocess
import tempfile
from pathlib import Path
from typing import Any, Mapping

import analysis
from analysis.errors import InputError
from webapp.services import audit
from webapp.store import datasets, engine_session, files, make_engine
from webapp.store.chain_logs import ADMIN_LOG, REVIEW_LOG, exists as chain_exists
from webapp.store.engine import current_revision, database_url, row_counts, table_names

FORMAT_NAME, FORMAT_VERSION = "latentdesk-backup", 1
MANIFEST = "manifest.json"
SQLITE_COPY, POSTGRES_DUMP = "latentdesk.db", "database.pgdump"
_CHUNK = 1 << 20


def backup(config: Mapping[str, Any], folder: str | os.PathLike) -> dict[str, Any]:
    """Write a backup of the configured site to ``folder`` (which must not exist yet); returns the manifest."""
    target = Path(folder)
    if target.exists():
        raise InputError(f"{target} exists already; a backup goes into a new folder")
    if not target.parent.is_dir():
        raise InputError(f"no folder {target.parent} to put the backup in")
    url = database_url(config)
    engine = make_engine(url)
    work = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=target.parent))
    try:
        if current_revision(engine) is None:
            raise InputError("the database has no LatentDesk tables; there is nothing to back up")
        with engine_session(engine) as session:
            head = audit.chain_head_record(session)
            counts = row_counts(session)
            revision = current_revision(engine)
            recorded = sorted(_stored_paths(session))
        database = _copy_database(url, work)
        copied = [_copy_file(files.absolute_path(config["HOME"], rel), work / rel, rel) for rel in recorded]
        manifest = {
            "format": FORMAT_NAME, "version": FORMAT_VERSION, "created_at": audit.utc_iso(audit.now_utc()),
            "analysis_version": analysis.__version__, "alembic_revision": revision, "database": database,
            "files": copied, "review_log_head": {"entries": head["entries"], "seq": head["seq"], "hash": head["hash"]},
            "counts": counts,
        }
        (work / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True), encoding="utf-8")
        os.replace(work, target)
        return manifest
    finally:
        engine.dispose()
        shutil.rmtree(work, ignore_errors=True)


def restore(config: Mapping[str, Any], folder: str | os.PathLike) -> dict[str, Any]:
    """Restore the backup in ``folder`` into the configured (empty) site; returns what was checked:
    ``chains`` (review and admin log: intact, broken_at, reason), ``head_matches``, ``counts_match``,
    ``counts`` and ``files``."""
    source = Path(folder)
    manifest = _read_manifest(source)
    _check_copies(source, manifest)
    url = database_url(config)
    kind = manifest["database"]["kind"]
    if kind != _kind(url):
        raise InputError(f"the backup holds a {kind} database; the site is configured for {_kind(url)}")
    _refuse_non_empty(url)
    _restore_database(url, source, manifest["database"])
    for entry in manifest["files"]:
        _copy_file(source / entry["path"], files.absolute_path(config["HOME"], entry["path"]), entry["path"])
    return _check_restored(url, manifest)


# --- database ----------------------------------------------------------------------------


def _refuse_non_empty(url: str) -> None:
    if _kind(url) == "sqlite" and not Path(url.removeprefix("sqlite:///")).exists():
        return  # a site that has never started: nothing there yet
    engine = make_engine(url)
    try:
        if current_revision(engine) is not None or table_names(engine):
            raise InputError(f"the target database {_display(url)} is not empty; restore goes into a new, empty one")
    finally:
        engine.dispose()


def _kind(url: str) -> str:
    return "sqlite" if url.startswith("sqlite") else "postgresql"


def _display(url: str) -> str:
    return url.split("@")[-1] if "@" in url else url


def _libpq_url(url: str) -> str:
    """SQLAlchemy's ``postgresql+psycopg://`` as the ``postgresql://`` URL pg_dump reads."""
    scheme, rest = url.split("://", 1)
    return f"postgresql://{rest}" if scheme.startswith("postgresql") else url


def _postgres_tool(name: str) -> str:
    """``pg_dump`` / ``pg_restore`` on PATH, else of the newest PostgreSQL under /usr/lib/postgresql."""
    found = shutil.which(name)
    if found:
        return found
    candidates = sorted(Path("/usr/lib/postgresql").glob(f"*/bin/{name}"),
                        key=lambda p: [int(x) for x in p.parts[-3].split(".") if x.isdigit()])
    if not candidates:
        raise InputError(f"{name} not found (install the PostgreSQL client tools); a PostgreSQL site is "
                         f"backed up and restored with pg_dump and pg_restore")
    return str(candidates[-1])


def _run(command: list[str], what: str) -> None:
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["no message"])[-1]
        raise InputError(f"{what} failed: {last}")


def _copy_database(url: str, work: Path) -> dict[str, Any]:
    if _kind(url) == "sqlite":
        destination = work / SQLITE_COPY
        source = sqlite3.connect(url.removeprefix("sqlite:///"))
        copy = sqlite3.connect(destination)
        try:
            with copy:
                source.backup(copy)
        finally:
            copy.close()
            source.close()
    else:
        destination = work / POSTGRES_DUMP
        _run([_postgres_tool("pg_dump"), "--format=custom", "--no-owner", f"--file={destination}",
              _libpq_url(url)], "pg_dump")
    return {"kind": _kind(url), "file": destination.name, "sha256": _sha256(destination),
            "bytes": destination.stat().st_size}


def _restore_database(url: str, source: Path, database: Mapping[str, Any]) -> None:
    copy = source / database["file"]
    if database["kind"] == "sqlite":
        target = Path(url.removeprefix("sqlite:///"))
        target.parent.mkdir(parents=True, exist_ok=True)
        for leftover in (target, Path(f"{target}-wal"), Path(f"{target}-shm")):
            leftover.unlink(missing_ok=True)  # an empty database file of a site that never stored anything
        _copy_file(copy, target, database["file"], database["sha256"])
    else:
        _run([_postgres_tool("pg_restore"), "--no-owner", "--exit-on-error", f"--dbname={_libpq_url(url)}",
              str(copy)], "pg_restore")


def _stored_paths(session) -> set[str]:
    """The content-addressed paths of every uploaded file a dataset records."""
    return {files.relative_path(sha) for sha in datasets.all_sha256(session)}


def _check_restored(url: str, manifest: Mapping[str, Any]) -> dict[str, Any]:
    engine = make_engine(url)
    try:
        with engine_session(engine) as session:
            chains = {}
            for name, log in (("review log", REVIEW_LOG), ("admin log", ADMIN_LOG)):
                if chain_exists(session, log):
                    intact, broken, reason = audit.verify_chain(session, log)
                    chains[name] = {"intact": intact, "broken_at": broken, "reason": reason}
            head = audit.chain_head_record(session)
            counts = row_counts(session)
    finally:
        engine.dispose()
    expected = manifest["review_log_head"]
    return {
        "chains": chains,
        "head_matches": (head["seq"], head["hash"]) == (expected["seq"], expected["hash"]),
        "counts_match": counts == manifest["counts"],
        "counts": counts,
        "files": len(manifest["files"]),
    }


# --- files -------------------------------------------------------------------------------


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _copy_file(source: Path, target: Path, name: str, sha256: str | None = None) -> dict[str, Any]:
    """Copy ``source`` to ``target`` through a temporary file renamed into place, checking its
    SHA-256 (the content address of an uploaded file, or the manifest's for the database)."""
    expected = sha256 or (name.rsplit("/", 1)[-1] if name.startswith(f"{files.FILES_FOLDER}/") else None)
    if not source.is_file():
        raise InputError(f"{name}: missing ({source})")
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=".restore-")
    digest, size = hashlib.sha256(), 0
    try:
        with source.open("rb") as reader, os.fdopen(fd, "wb") as writer:
            for chunk in iter(lambda: reader.read(_CHUNK), b""):
                digest.update(chunk)
                writer.write(chunk)
                size += len(chunk)
            writer.flush()
            os.fsync(writer.fileno())
        if expected is not None and digest.hexdigest() != expected:
            raise InputError(f"{name}: its SHA-256 is {digest.hexdigest()}, not {expected}; the file is damaged")
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return {"path": name, "sha256": digest.hexdigest(), "bytes": size}


def _read_manifest(source: Path) -> dict[str, Any]:
    path = source / MANIFEST
    if not path.is_file():
        raise InputError(f"{source} is not a LatentDesk backup: no {MANIFEST}")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not valid JSON ({exc})") from exc
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        raise InputError(f"{path}: not a LatentDesk backup manifest")
    if manifest.get("version") != FORMAT_VERSION:
        raise InputError(f"{path}: backup format version {manifest.get('version')!r}; this LatentDesk reads "
                         f"version {FORMAT_VERSION}")
    for key in ("database", "files", "review_log_head", "counts"):
        if key not in manifest:
            raise InputError(f"{path}: the key {key!r} is missing")
    return manifest


def _check_copies(source: Path, manifest: Mapping[str, Any]) -> None:
    """Every copy in the backup is there and has the SHA-256 the manifest gives, before anything is written."""
    wanted = [(manifest["database"]["file"], manifest["database"]["sha256"])]
    wanted += [(entry["path"], entry["sha256"]) for entry in manifest["files"]]
    for name, sha256 in wanted:
        path = source / name
        if ".." in Path(name).parts or Path(name).is_absolute():
            raise InputError(f"{MANIFEST}: {name!r} is not a path inside the backup")
        if not path.is_file():
            raise InputError(f"{name}: listed in {MANIFEST} but missing from {source}")
        found = _sha256(path)
        if found != sha256:
            raise InputError(f"{name}: its SHA-256 is {found}, not {sha256} as {MANIFEST} says; the backup is damaged")
