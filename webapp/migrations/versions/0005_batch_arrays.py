"""batch_arrays: a batch's scores and measured values as one block of numbers per batch

Revision ID: 0005_batch_arrays
Revises: 0004_batches
Create Date: 2026-12-04

Until now every checked sample kept its scores and measured values as JSON
lists in its own ``batch_samples`` row; storing and reading 10,000 of them
per batch cost seconds. A new append-only table ``batch_arrays`` keeps them
per batch as little-endian float64 matrices (NaN for a missing value), rows
in run order: scores (n_samples x n_components) and measured values
(n_samples x n_variables, the model's variable order). Existing rows are
copied over, then the two JSON columns are dropped from ``batch_samples``.

SQLite: ``BEFORE`` triggers with ``RAISE(ABORT, ...)``; PostgreSQL: the
``latentdesk_append_only`` function of 0002_review_guards.
(US FDA 21 CFR Part 11, 11.10(e); EU GMP Annex 11, 2011, section 9.)
"""
import json

from alembic import op
import numpy as np
import sqlalchemy as sa


revision = "0005_batch_arrays"
down_revision = "0004_batches"
branch_labels = None
depends_on = None

_SQLITE = [
    f"CREATE TRIGGER batch_arrays_no_{name.lower()} BEFORE {name} ON batch_arrays "
    f"BEGIN SELECT RAISE(ABORT, 'batch_arrays is append-only: {name} refused'); END"
    for name in ("UPDATE", "DELETE")
]
_POSTGRES = [
    "CREATE TRIGGER batch_arrays_append_only BEFORE UPDATE OR DELETE ON batch_arrays "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()",
    "CREATE TRIGGER batch_arrays_no_truncate BEFORE TRUNCATE ON batch_arrays "
    "FOR EACH STATEMENT EXECUTE FUNCTION latentdesk_append_only()",
]


def _matrix(lists: list, width: int) -> bytes:
    values = [[np.nan if v is None else float(v) for v in row] for row in lists]
    return np.asarray(values, dtype="<f8").reshape(len(lists), width).tobytes()


def _decoded(value):
    return json.loads(value) if isinstance(value, str) else value


def _copy_existing(bind) -> None:
    samples = sa.table("batch_samples", sa.column("batch_id"), sa.column("run_index"), sa.column("scores"),
                       sa.column("measured"))
    arrays = sa.table("batch_arrays", sa.column("batch_id"), sa.column("n_components"), sa.column("n_variables"),
                      sa.column("scores"), sa.column("measured"))
    batch_ids = [row[0] for row in bind.execute(sa.select(samples.c.batch_id).distinct())]
    for batch_id in batch_ids:
        rows = bind.execute(
            sa.select(samples.c.scores, samples.c.measured).where(samples.c.batch_id == batch_id)
            .order_by(samples.c.run_index)
        ).all()
        scores = [_decoded(r[0]) for r in rows]
        measured = [_decoded(r[1]) for r in rows]
        n_components, n_variables = len(scores[0]), len(measured[0])
        bind.execute(arrays.insert().values(
            batch_id=batch_id, n_components=n_components, n_variables=n_variables,
            scores=_matrix(scores, n_components), measured=_matrix(measured, n_variables),
        ))


def upgrade() -> None:
    op.create_table(
        "batch_arrays",
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("n_components", sa.Integer(), nullable=False),
        sa.Column("n_variables", sa.Integer(), nullable=False),
        sa.Column("scores", sa.LargeBinary(), nullable=False),
        sa.Column("measured", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(["batch_id"], ["batches.id"], name=op.f("fk_batch_arrays_batch_id_batches")),
        sa.PrimaryKeyConstraint("batch_id", name=op.f("pk_batch_arrays")),
    )
    bind = op.get_bind()
    _copy_existing(bind)
    for column in ("scores", "measured"):  # SQLite 3.35 and later, PostgreSQL: plain DROP COLUMN
        op.execute(f"ALTER TABLE batch_samples DROP COLUMN {column}")
    for statement in _POSTGRES if bind.dialect.name == "postgresql" else _SQLITE:
        op.execute(statement)


_SAMPLE_TRIGGERS = {  # the append-only triggers of 0004_batches on batch_samples
    "sqlite": [
        f"CREATE TRIGGER batch_samples_no_{name.lower()} BEFORE {name} ON batch_samples "
        f"BEGIN SELECT RAISE(ABORT, 'batch_samples is append-only: {name} refused'); END"
        for name in ("UPDATE", "DELETE")
    ],
    "postgresql": [
        "CREATE TRIGGER batch_samples_append_only BEFORE UPDATE OR DELETE ON batch_samples "
        "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()",
    ],
}
_DROP_SAMPLE_TRIGGERS = {
    "sqlite": ["DROP TRIGGER batch_samples_no_update", "DROP TRIGGER batch_samples_no_delete"],
    "postgresql": ["DROP TRIGGER batch_samples_append_only ON batch_samples"],
}


def _json_rows(matrix: np.ndarray) -> list[str]:
    return [json.dumps([None if np.isnan(v) else v for v in row.tolist()]) for row in matrix]


def downgrade() -> None:
    """Back to per-sample JSON lists: the arrays are copied into batch_samples again."""
    bind = op.get_bind()
    dialect = "postgresql" if bind.dialect.name == "postgresql" else "sqlite"
    for column in ("measured", "scores"):
        op.add_column("batch_samples", sa.Column(column, sa.JSON(), nullable=False, server_default="[]"))
    for statement in _DROP_SAMPLE_TRIGGERS[dialect]:
        op.execute(statement)
    arrays = bind.execute(sa.text(
        "SELECT batch_id, n_components, n_variables, scores, measured FROM batch_arrays")).all()
    for batch_id, n_components, n_variables, scores, measured in arrays:
        ids = [r[0] for r in bind.execute(sa.text(
            "SELECT id FROM batch_samples WHERE batch_id = :b ORDER BY run_index"), {"b": batch_id})]
        score_rows = _json_rows(np.frombuffer(scores, dtype="<f8").reshape(-1, n_components))
        measured_rows = _json_rows(np.frombuffer(measured, dtype="<f8").reshape(-1, n_variables))
        cast = "CAST(:s AS JSON)" if dialect == "postgresql" else ":s"
        cast_m = cast.replace(":s", ":m")
        for sample_id, score_text, measured_text in zip(ids, score_rows, measured_rows):
            bind.execute(sa.text(f"UPDATE batch_samples SET scores = {cast}, measured = {cast_m} WHERE id = :i"),
                         {"s": score_text, "m": measured_text, "i": sample_id})
    for statement in _SAMPLE_TRIGGERS[dialect]:
        op.execute(statement)
    if dialect == "postgresql":
        op.execute("DROP TABLE batch_arrays")
    else:
        op.drop_table("batch_arrays")  # its triggers go with it
