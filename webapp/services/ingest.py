"""Uploads: check a file with intake, store it content-addressed, record the dataset.

A dataset is immutable and known by the SHA-256 of its raw bytes (docs/design.md section 3).
The bytes live at ``HOME/files/<sha[:2]>/<sha>``; the user's file name is
display text only and never part of a path. Storing is one unit of work: the
file is written to a temporary name and moved into place with ``os.replace``
(atomic on POSIX; ``webapp.store.files``), then the database row is committed;
if anything fails in between, the new file is removed again, so a failure
leaves no half dataset (a worker killed outright leaves at most a complete but
unlisted file, which ``remove_orphan_files`` sweeps). Uploading the same bytes
with the same intake options returns the dataset already stored. Parsed Tables
are cached on disk (``HOME/cache/tables``) so fits do not re-read the file.
"""

from __future__ import annotations

import hashlib
from contextlib import contextmanager
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any, Iterator

import diskcache
from flask import current_app

from analysis.canonical_json import canonical_sha256
from analysis.errors import InputError
from analysis.intake import read_table
from analysis.table import Table
from webapp.services import projects
from webapp.services.context import cache_folder, home_folder, max_upload_bytes, session_scope
from webapp.store import datasets as store
from webapp.store import files

TABLE_CACHE_FOLDER = "tables"
LOCK_SECONDS = 600
NAME_LIMIT = 255


class DatasetNotFound(LookupError):
    """No dataset with that id (the API answers 404)."""


def intake_options(
    *,
    id_column: str | None = None,
    sheet: str | None = None,
    roles: dict[str, str] | None = None,
    group_columns=(),
    below_limit: str = "half",
    bad_cells: str = "error",
) -> dict[str, Any]:
    """The intake options in the canonical form stored with a dataset."""
    return {
        "id_column": id_column or None,
        "sheet": sheet or None,
        "roles": dict(sorted((str(k), str(v)) for k, v in (roles or {}).items())) or None,
        "group_columns": [str(c) for c in group_columns],
        "below_limit": below_limit,
        "bad_cells": bad_cells,
    }


def options_key(sha256: str, options: dict[str, Any]) -> str:
    """Identity of a dataset: its bytes plus the options that turned them into a Table."""
    return canonical_sha256({"sha256": sha256, "intake": options})


def display_name(filename: str) -> str:
    """The last component of a client-supplied file name, as display text only."""
    name = PureWindowsPath(PurePosixPath(str(filename or "")).name).name.strip()
    return (name or "upload")[:NAME_LIMIT]


def _read(raw: bytes, filename: str, options: dict[str, Any]):
    return read_table(
        raw,
        filename,
        id_column=options["id_column"],
        group_columns=tuple(options["group_columns"]),
        sheet=options["sheet"],
        below_limit=options["below_limit"],
        bad_cells=options["bad_cells"],
        roles=options["roles"],
        max_bytes=max_upload_bytes(),
    )


def preview_upload(raw: bytes, filename: str, **options) -> dict[str, Any]:
    """Run intake on ``raw`` without storing anything; the IntakeReport as a dict.

    Keyword options are those of :func:`intake_options`. Raises InputError
    (IntakeError) with intake's message for a file that cannot be read.
    """
    opts = intake_options(**options)
    table, report = _read(raw, display_name(filename), opts)
    preview = report.to_dict()
    preview.update(
        sha256=hashlib.sha256(raw).hexdigest(),
        n_samples=table.n_samples,
        n_variables=table.n_variables,
        variables=table.variables,
        metadata_columns=table.metadata_columns,
    )
    return preview


def blob_path(sha256: str) -> Path:
    """Absolute path of the stored bytes with this SHA-256."""
    return files.absolute_path(home_folder(), files.relative_path(sha256))


@contextmanager
def _upload_lock(sha256: str) -> Iterator[None]:
    # Serialises uploads of the same bytes across gunicorn workers on this host,
    # so the "already stored?" check, the file write and the insert (or the
    # clean-up after a failed insert) of one upload never interleave with another's.
    with diskcache.Cache(str(cache_folder() / "locks")) as cache:
        with diskcache.Lock(cache, f"ingest:{sha256}", expire=LOCK_SECONDS):
            yield


def ingest_upload(
    raw: bytes,
    filename: str,
    user_id: int,
    *,
    id_column: str | None = None,
    sheet: str | None = None,
    roles: dict[str, str] | None = None,
    group_columns=(),
    below_limit: str = "half",
    bad_cells: str = "error",
    project_id: int | None = None,
) -> dict[str, Any]:
    """Check, store and record an uploaded file in a project; the dataset as the API shows it.

    ``project_id`` (the caller checked the uploader's role there) defaults as
    ``projects.project_for_upload`` says.

    Returns the dataset dict (see :func:`webapp.store.datasets.dataset_dict`) plus
    ``created`` (False when these bytes with these options were stored before).
    Raises InputError (IntakeError) for a file intake refuses; nothing is stored then.
    """
    name = display_name(filename)
    sha256 = hashlib.sha256(raw).hexdigest()
    opts = intake_options(
        id_column=id_column,
        sheet=sheet,
        roles=roles,
        group_columns=group_columns,
        below_limit=below_limit,
        bad_cells=bad_cells,
    )
    project = projects.project_for_upload(project_id, user_id)
    with _upload_lock(sha256):
        with session_scope() as session:
            existing = store.find_dataset(session, sha256, opts, project)
            if existing is not None:
                return {**store.dataset_dict(existing), "created": False}
        table, report = _read(raw, name, opts)
        created = not blob_path(sha256).exists()
        stored = files.store_bytes(home_folder(), raw)
        try:
            with session_scope() as session:
                row = store.insert_dataset(
                    session,
                    sha256=sha256,
                    name=name,
                    stored_path=stored.stored_path,
                    size_bytes=stored.size_bytes,
                    id_column=table.id_column,
                    sheet=opts["sheet"],
                    intake_options=opts,
                    n_samples=table.n_samples,
                    n_variables=table.n_variables,
                    variables=table.variables,
                    metadata_columns=table.metadata_columns,
                    warnings=list(report.warnings),
                    report=report.to_dict(),
                    uploaded_by=user_id,
                    project_id=project,
                )
                result = store.dataset_dict(row)
        except BaseException:
            if created:
                _remove_unreferenced_blob(sha256)
            raise
        _remember_table(options_key(sha256, opts), table)  # the first fit need not parse again
    return {**result, "created": True}


def _remove_unreferenced_blob(sha256: str) -> None:
    try:
        with session_scope() as session:
            referenced = store.sha256_in_use(session, sha256)
    except Exception:  # noqa: BLE001 - database gone: the file is unreferenced by definition
        referenced = False
    if not referenced:
        blob_path(sha256).unlink(missing_ok=True)


def remove_orphan_files(min_age_seconds: float = 3600.0) -> list[str]:
    """Delete stored files no dataset refers to (see ``files.remove_unrecorded``)."""
    with session_scope() as session:
        known = store.all_sha256(session)
    return files.remove_unrecorded(home_folder(), known, min_age_seconds)


def dataset_info(dataset_id: int) -> dict[str, Any]:
    """The dataset dict for ``dataset_id``; DatasetNotFound when there is none."""
    with session_scope() as session:
        row = store.get_dataset(session, dataset_id)
        if row is None:
            raise DatasetNotFound(dataset_id)
        return store.dataset_dict(row, full=True)


def list_datasets(visible: set[int] | None = None) -> list[dict[str, Any]]:
    """Every dataset of the projects in ``visible`` (None: of every project), newest first."""
    with session_scope() as session:
        return [store.dataset_dict(row) for row in store.list_datasets(session, visible)]


def load_table(dataset_id: int) -> Table:
    """Re-read a stored dataset into a Table (cached on disk by content and options).

    The stored bytes are checked against their SHA-256 before parsing, so a
    damaged file is reported instead of silently giving other numbers.
    """
    info = dataset_info(dataset_id)
    key = options_key(info["sha256"], info["intake_options"])
    with _table_cache() as cache:
        try:
            table = cache.get(key)
        except Exception:  # noqa: BLE001 - unreadable cache entry: parse again
            table = None
        if isinstance(table, Table):
            return table
        table = _parse_stored(dataset_id, info)
        cache.set(key, table)
    return table


def _table_cache() -> diskcache.Cache:
    return diskcache.Cache(str(cache_folder() / TABLE_CACHE_FOLDER))


def _remember_table(key: str, table: Table) -> None:
    """Cache a freshly read Table; a cache that cannot be written only costs a re-read."""
    try:
        with _table_cache() as cache:
            cache.set(key, table)
    except Exception:  # noqa: BLE001 - the dataset is committed; do not fail the upload for a cache
        current_app.logger.warning("could not cache the table of %s", key, exc_info=True)


def _parse_stored(dataset_id: int, info: dict[str, Any]) -> Table:
    raw = files.read_bytes(home_folder(), info["stored_path"])
    if hashlib.sha256(raw).hexdigest() != info["sha256"]:
        raise RuntimeError(f"stored file for dataset {dataset_id} does not match its SHA-256")
    try:
        table, _ = _read(raw, info["name"], info["intake_options"])
    except InputError as exc:  # accepted once, so this means the intake rules changed
        raise RuntimeError(f"dataset {dataset_id} can no longer be read: {exc}") from exc
    return table
