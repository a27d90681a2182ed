"""Query functions for checked batches, their samples and the outcomes signed on them.

Every function takes a Session; the caller commits, inside the review write
lock (``webapp.store.review.lock_review``) for every write.  The database
guards the rows (migration 0004_batches): batches frozen but for open ->
reviewed, samples and outcomes append-only, outcomes only on flagged samples.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Iterable

from sqlalchemy import func, select, update
from sqlalchemy.orm import Session, defer

from webapp.store.engine import add_and_flush
from webapp.store.tables import Batch, BatchOutcome, BatchSample


def insert_batch(session: Session, **fields: Any) -> Batch:
    """Add a batch row and flush it (its id is then known)."""
    return add_and_flush(session, Batch(**fields))


def insert_samples(session: Session, rows: Iterable[dict[str, Any]]) -> None:
    """Add checked samples (dicts of ``BatchSample`` columns) in one statement."""
    rows = list(rows)
    if rows:
        session.execute(BatchSample.__table__.insert(), rows)


def get_batch(session: Session, batch_id: int) -> Batch | None:
    return session.scalar(select(Batch).where(Batch.id == batch_id).execution_options(populate_existing=True))


def batches_of(session: Session, reference_model_id: int) -> list[Batch]:
    """Every batch of a reference model, oldest first."""
    return list(session.scalars(
        select(Batch).where(Batch.reference_model_id == reference_model_id).order_by(Batch.id)
    ))


def batch_with_file(session: Session, reference_model_id: int, file_sha256: str) -> Batch | None:
    """The earliest batch of this reference model made from a file with this SHA-256."""
    return session.scalar(
        select(Batch)
        .where(Batch.reference_model_id == reference_model_id, Batch.file_sha256 == file_sha256)
        .order_by(Batch.id)
        .limit(1)
    )


def samples_checked_before(session: Session, reference_model_id: int, sample_ids: list[str]) -> dict[str, int]:
    """sample id -> the batch id where it was first checked under this reference model."""
    found: dict[str, int] = {}
    wanted = list(dict.fromkeys(sample_ids))
    for start in range(0, len(wanted), 500):  # keep the IN list within every engine's limits
        rows = session.execute(
            select(BatchSample.sample_id, func.min(BatchSample.batch_id))
            .where(BatchSample.reference_model_id == reference_model_id,
                   BatchSample.sample_id.in_(wanted[start:start + 500]))
            .group_by(BatchSample.sample_id)
        )
        found.update({sample: batch for sample, batch in rows})
    return found


def last_run_index(session: Session, reference_model_id: int) -> int:
    """The highest run index used under this reference model (0 before the first batch)."""
    highest = session.scalar(
        select(func.max(BatchSample.run_index)).where(BatchSample.reference_model_id == reference_model_id)
    )
    return int(highest or 0)


SERIES_COLUMNS = (BatchSample.run_index, BatchSample.batch_id, BatchSample.sample_id, BatchSample.scores,
                  BatchSample.t2, BatchSample.spe)


def series(session: Session, reference_model_id: int) -> list[tuple]:
    """(run_index, batch_id, sample_id, scores, t2, spe) of every checked sample, in run order."""
    return [tuple(row) for row in session.execute(
        select(*SERIES_COLUMNS).where(BatchSample.reference_model_id == reference_model_id)
        .order_by(BatchSample.run_index)
    )]


def samples_of(session: Session, batch_id: int, *, with_values: bool = True) -> list[BatchSample]:
    """The batch's samples in run order; ``with_values=False`` leaves the measured values
    (one number per variable) unread until asked for."""
    query = select(BatchSample).where(BatchSample.batch_id == batch_id).order_by(BatchSample.run_index)
    if not with_values:
        query = query.options(defer(BatchSample.measured))
    return list(session.scalars(query))


def checked_samples(session: Session, reference_model_id: int) -> list[BatchSample]:
    """Every checked sample of a reference model, in run order (measured values unread)."""
    return list(session.scalars(
        select(BatchSample).where(BatchSample.reference_model_id == reference_model_id)
        .order_by(BatchSample.run_index).options(defer(BatchSample.measured))
    ))


def insert_outcome(session: Session, **fields: Any) -> BatchOutcome:
    """Add one signed outcome (append-only; the database refuses one on an unflagged sample)."""
    return add_and_flush(session, BatchOutcome(**fields))


def outcomes_of(session: Session, batch_sample_ids: list[int]) -> dict[int, list[BatchOutcome]]:
    """Each sample's outcomes in the order they were signed (the last one stands)."""
    out: dict[int, list[BatchOutcome]] = {i: [] for i in batch_sample_ids}
    for start in range(0, len(batch_sample_ids), 500):
        rows = session.scalars(
            select(BatchOutcome)
            .where(BatchOutcome.batch_sample_id.in_(batch_sample_ids[start:start + 500]))
            .order_by(BatchOutcome.id)
        )
        for row in rows:
            out[row.batch_sample_id].append(row)
    return out


def mark_reviewed(session: Session, batch_id: int, reviewed_at: datetime) -> bool:
    """open -> reviewed; False when the batch was not open any more."""
    result = session.execute(
        update(Batch).where(Batch.id == batch_id, Batch.state == "open")
        .values(state="reviewed", reviewed_at=reviewed_at)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1
