"""Query functions for checked batches, their samples and the outcomes signed on them.

Every function takes a Session; the caller commits, inside the review write
lock (``webapp.store.review.lock_review``) for every write.  The database
guards the rows (migration 0004_batches): batches frozen but for open ->
reviewed, samples and outcomes append-only, outcomes only on flagged samples.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any, Iterable

import json
from typing import NamedTuple

import numpy as np
import orjson
from sqlalchemy import Row, Text, cast, func, select, update
from sqlalchemy.orm import Session

from webapp.store.engine import add_and_flush
from webapp.store.tables import Batch, BatchArrays, BatchOutcome, BatchSample

ARRAY_DTYPE = "<f8"  # little-endian float64, the layout of BatchArrays


def insert_batch(session: Session, **fields: Any) -> Batch:
    """Add a batch row and flush it (its id is then known)."""
    return add_and_flush(session, Batch(**fields))


INSERT_CHUNK = 1000  # rows per INSERT statement: the parameter dicts of a large batch never all exist at once


def insert_samples(session: Session, reference_model_id: int, samples: list["SampleRow"]) -> None:
    """Add checked samples (``SampleRow``, ``id`` None) of one reference model, in chunks."""
    for start in range(0, len(samples), INSERT_CHUNK):
        session.execute(BatchSample.__table__.insert(), [
            dict(zip(SampleRow._fields[1:], row[1:]), reference_model_id=reference_model_id)  # id: the database's
            for row in samples[start:start + INSERT_CHUNK]
        ])


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


NO_VIOLATIONS = "[]"
SAMPLE_COLUMNS = (
    BatchSample.id, BatchSample.batch_id, BatchSample.run_index, BatchSample.sample_id, BatchSample.t2,
    BatchSample.spe, BatchSample.incomplete, BatchSample.t2_warning, BatchSample.t2_action,
    BatchSample.spe_warning, BatchSample.spe_action, BatchSample.flagged,
    # read as text: almost every sample has none, and decoding "[]" 100,000 times costs a second
    cast(BatchSample.violations, Text).label("violations_text"),
)


class SampleRow(NamedTuple):
    """One checked sample as read (the ``BatchSample`` columns but the arrays)."""

    id: int
    batch_id: int
    run_index: int
    sample_id: str
    t2: float
    spe: float
    incomplete: bool
    t2_warning: bool
    t2_action: bool
    spe_warning: bool
    spe_action: bool
    flagged: bool
    violations: list


def _sample_row(row: Row) -> SampleRow:
    text = row[-1]
    return SampleRow(*row[:-1], [] if text == NO_VIOLATIONS else json.loads(text))


def _plain_rows(session: Session, query) -> list[tuple]:
    """The rows of ``query`` as the database driver returns them, without SQLAlchemy's per-row
    objects and type processing (100,000 rows: 0.1 s instead of 0.4 s).  Only for columns whose
    driver values are already what the caller needs, or are converted by it (booleans may
    arrive as 0/1)."""
    result = session.connection().execute(query)
    try:
        return result.cursor.fetchall()
    finally:
        result.close()


def _rows(session: Session, where) -> list[SampleRow]:
    """Checked samples matching ``where``, in run order."""
    return [_sample_row(row) for row in
            session.execute(select(*SAMPLE_COLUMNS).where(where).order_by(BatchSample.run_index))]


def samples_of(session: Session, batch_id: int) -> list[SampleRow]:
    """The batch's checked samples in run order."""
    return _rows(session, BatchSample.batch_id == batch_id)


def checked_samples(session: Session, reference_model_id: int) -> list[SampleRow]:
    """Every checked sample of a reference model, in run order."""
    return _rows(session, BatchSample.reference_model_id == reference_model_id)


CHART_COLUMNS = (BatchSample.id, BatchSample.run_index, BatchSample.batch_id, BatchSample.sample_id, BatchSample.t2,
                 BatchSample.spe, BatchSample.flagged)


def chart_columns(session: Session, reference_model_id: int) -> dict[str, list]:
    """Every checked sample of a reference model in run order, column by column
    (id, run_index, batch_id, sample_id, t2, spe, flagged)."""
    rows = _plain_rows(session, select(*CHART_COLUMNS).where(BatchSample.reference_model_id == reference_model_id)
                       .order_by(BatchSample.run_index))
    columns = list(zip(*rows)) if rows else [()] * len(CHART_COLUMNS)
    found = {column.key: list(values) for column, values in zip(CHART_COLUMNS, columns)}
    found["flagged"] = [bool(v) for v in found["flagged"]]
    return found


def violations_of(session: Session, reference_model_id: int) -> list[tuple[str, int, list]]:
    """(sample id, run index, violations) of every checked sample at which a run rule fired, in run order."""
    rows = _plain_rows(session, select(BatchSample.sample_id, BatchSample.run_index, SAMPLE_COLUMNS[-1])
                       .where(BatchSample.reference_model_id == reference_model_id,
                              cast(BatchSample.violations, Text) != NO_VIOLATIONS)
                       .order_by(BatchSample.run_index))
    return [(sample, run, orjson.loads(text)) for sample, run, text in rows]


def last_samples(session: Session, reference_model_id: int, count: int) -> list[SampleRow]:
    """The ``count`` most recently checked samples of a reference model, in run order."""
    if count <= 0:
        return []
    latest = session.execute(
        select(*SAMPLE_COLUMNS).where(BatchSample.reference_model_id == reference_model_id)
        .order_by(BatchSample.run_index.desc()).limit(count)
    )
    return [_sample_row(row) for row in latest][::-1]


def first_runs(session: Session, batch_ids: Iterable[int]) -> dict[int, int]:
    """batch id -> the run index of its first sample (row 0 of its arrays)."""
    wanted = sorted(set(batch_ids))
    return dict(session.execute(
        select(BatchSample.batch_id, func.min(BatchSample.run_index))
        .where(BatchSample.batch_id.in_(wanted)).group_by(BatchSample.batch_id)
    ).all()) if wanted else {}


def insert_arrays(session: Session, batch_id: int, scores: np.ndarray, measured: np.ndarray) -> None:
    """Store a batch's scores and measured values (rows in run order, NaN = missing)."""
    session.execute(BatchArrays.__table__.insert(), [{
        "batch_id": batch_id, "n_components": int(scores.shape[1]), "n_variables": int(measured.shape[1]),
        "scores": np.ascontiguousarray(scores, dtype=ARRAY_DTYPE).tobytes(),
        "measured": np.ascontiguousarray(measured, dtype=ARRAY_DTYPE).tobytes(),
    }])


def arrays_of(session: Session, batch_ids: Iterable[int], *, measured: bool = False) -> dict[int, dict[str, np.ndarray]]:
    """batch id -> {"scores": (n, A) array[, "measured": (n, p) array]}; read-only float64 views."""
    wanted = sorted(set(batch_ids))
    columns = [BatchArrays.batch_id, BatchArrays.n_components, BatchArrays.scores]
    if measured:
        columns += [BatchArrays.n_variables, BatchArrays.measured]
    found: dict[int, dict[str, np.ndarray]] = {}
    for start in range(0, len(wanted), 500):
        for row in session.execute(select(*columns).where(BatchArrays.batch_id.in_(wanted[start:start + 500]))):
            arrays = {"scores": np.frombuffer(row.scores, dtype=ARRAY_DTYPE).reshape(-1, row.n_components)}
            if measured:
                arrays["measured"] = np.frombuffer(row.measured, dtype=ARRAY_DTYPE).reshape(-1, row.n_variables)
            found[row.batch_id] = arrays
    return found


def insert_outcome(session: Session, **fields: Any) -> BatchOutcome:
    """Add one signed outcome (append-only; the database refuses one on an unflagged sample)."""
    return add_and_flush(session, BatchOutcome(**fields))


def outcomes_of(session: Session, *, batch_id: int | None = None,
                reference_model_id: int | None = None) -> dict[int, list[BatchOutcome]]:
    """batch sample id -> its outcomes in the order they were signed (the last one stands), for
    the samples of one batch or of one reference model (samples without outcomes are absent)."""
    where = (BatchSample.batch_id == batch_id) if batch_id is not None else (
        BatchSample.reference_model_id == reference_model_id)
    out: dict[int, list[BatchOutcome]] = {}
    for row in session.scalars(
        select(BatchOutcome).join(BatchSample, BatchSample.id == BatchOutcome.batch_sample_id)
        .where(where).order_by(BatchOutcome.id)
    ):
        out.setdefault(row.batch_sample_id, []).append(row)
    return out


def mark_reviewed(session: Session, batch_id: int, reviewed_at: datetime) -> bool:
    """open -> reviewed; False when the batch was not open any more."""
    result = session.execute(
        update(Batch).where(Batch.id == batch_id, Batch.state == "open")
        .values(state="reviewed", reviewed_at=reviewed_at)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1
