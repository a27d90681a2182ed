"""Query functions for datasets and fitted models (each takes a Session)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from webapp.store.engine import add_and_flush
from webapp.store.tables import Dataset, Model


def insert_dataset(session: Session, **fields: Any) -> Dataset:
    """Add a dataset row and flush it (so it has an id); the caller commits."""
    return add_and_flush(session, Dataset(**fields))


def find_dataset(session: Session, sha256: str, intake_options: dict[str, Any], project_id: int) -> Dataset | None:
    """The project's oldest dataset with these bytes read with these intake options, if any."""
    rows = session.scalars(select(Dataset).where(Dataset.sha256 == sha256, Dataset.project_id == project_id)
                           .order_by(Dataset.id))
    for row in rows:
        if row.intake_options == intake_options:
            return row
    return None


def get_dataset(session: Session, dataset_id: int) -> Dataset | None:
    return session.get(Dataset, dataset_id)


def list_datasets(session: Session, projects: set[int] | None = None) -> list[Dataset]:
    """Every dataset (of ``projects`` when given), newest first."""
    query = select(Dataset).order_by(Dataset.id.desc())
    if projects is not None:
        query = query.where(Dataset.project_id.in_(sorted(projects)))
    return list(session.scalars(query))




def sha256_in_use(session: Session, sha256: str) -> bool:
    """True when some dataset row refers to the stored bytes with this SHA-256."""
    return session.scalar(select(Dataset.id).where(Dataset.sha256 == sha256).limit(1)) is not None


def all_sha256(session: Session) -> set[str]:
    return set(session.scalars(select(Dataset.sha256).distinct()))




def dataset_dict(row: Dataset, *, full: bool = False) -> dict[str, Any]:
    """The dataset as the API shows it; ``full`` adds the intake report and options."""
    out = {
        "id": row.id,
        "sha256": row.sha256,
        "name": row.name,
        "size_bytes": row.size_bytes,
        "id_column": row.id_column,
        "sheet": row.sheet,
        "n_samples": row.n_samples,
        "n_variables": row.n_variables,
        "variables": list(row.variables),
        "metadata_columns": list(row.metadata_columns),
        "warnings": list(row.warnings),
        "uploaded_by": row.uploaded_by,
        "created_at": row.created_at.isoformat() if row.created_at else None,
        "project_id": row.project_id,
    }
    if full:
        out["intake_options"] = dict(row.intake_options)
        out["stored_path"] = row.stored_path
        out["report"] = dict(row.report)
    return out


def get_model_row(session: Session, model_id: int) -> Model | None:
    return session.get(Model, model_id)


def model_by_fingerprint(session: Session, fingerprint: str) -> Model | None:
    return session.scalar(select(Model).where(Model.fingerprint == fingerprint))


def models_of_dataset(session: Session, dataset_id: int) -> list[Model]:
    """The dataset's recorded models, newest first."""
    return list(
        session.scalars(select(Model).where(Model.dataset_id == dataset_id).order_by(Model.id.desc()))
    )


def record_model(
    session: Session,
    *,
    dataset_id: int,
    fingerprint: str,
    settings: dict[str, Any],
    summary: dict[str, Any],
    created_by: int,
) -> Model:
    """The model row for ``fingerprint``, inserting (and flushing) it when new.

    The fingerprint column is UNIQUE: when another worker inserts the same
    model at the same moment, the flush or commit raises IntegrityError; the
    caller then reads the other worker's row in a new session.
    """
    existing = model_by_fingerprint(session, fingerprint)
    if existing is not None:
        return existing
    row = Model(
        dataset_id=dataset_id,
        fingerprint=fingerprint,
        settings=settings,
        summary=summary,
        created_by=created_by,
    )
    return add_and_flush(session, row)
