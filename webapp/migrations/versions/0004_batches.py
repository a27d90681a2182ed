"""batches: new samples checked against an approved reference model, and their outcomes

Revision ID: 0004_batches
Revises: 0003_reference_models
Create Date: 2026-12-09

Three tables (see webapp/store/tables.py): ``batches``, ``batch_samples`` and
``batch_outcomes``. The database itself refuses what the app never does:

- a batch is never deleted and its content never changes; its state moves
  only open -> reviewed (with the time);
- checked samples are append-only;
- outcomes are append-only (a correction is a new signed row) and are
  recorded only on a flagged sample.

SQLite: ``BEFORE`` triggers with ``RAISE(ABORT, ...)``; PostgreSQL: trigger
functions that raise an exception (the style of 0003_reference_models).
(US FDA 21 CFR Part 11, 11.10(e); EU GMP Annex 11, 2011, section 9.)
"""
from alembic import op
import sqlalchemy as sa


revision = "0004_batches"
down_revision = "0003_reference_models"
branch_labels = None
depends_on = None

FROZEN = (
    "id", "reference_model_id", "file_name", "file_sha256", "intake_options", "uploaded_by", "created_at",
    "n_samples", "n_flagged", "warnings", "retest",
)
JSON_COLUMNS = ("intake_options", "warnings")
APPEND_ONLY = ("batch_samples", "batch_outcomes")

_MOVE = "a batch moves only from open to reviewed"
_ALLOWED_MOVE = "(OLD.state = 'open' AND NEW.state = 'reviewed' AND NEW.reviewed_at IS NOT NULL)"
_FLAGGED = "an outcome is recorded only on a flagged sample"
_ON_FLAGGED = "(SELECT flagged FROM batch_samples WHERE id = NEW.batch_sample_id)"


def _sqlite_changed() -> str:
    return " OR ".join(f"NEW.{c} IS NOT OLD.{c}" for c in FROZEN)


def _postgres_changed() -> str:
    def side(prefix):
        return ", ".join(f"{prefix}.{c}::text" if c in JSON_COLUMNS else f"{prefix}.{c}" for c in FROZEN)

    return f"ROW({side('NEW')}) IS DISTINCT FROM ROW({side('OLD')})"


_SQLITE = [
    "CREATE TRIGGER batches_frozen BEFORE UPDATE ON batches "
    f"WHEN {_sqlite_changed()} "
    "BEGIN SELECT RAISE(ABORT, 'a batch''s content is frozen: UPDATE refused'); END",
    f"CREATE TRIGGER batches_moves BEFORE UPDATE ON batches WHEN NOT {_ALLOWED_MOVE} "
    f"BEGIN SELECT RAISE(ABORT, '{_MOVE}'); END",
    "CREATE TRIGGER batches_no_delete BEFORE DELETE ON batches "
    "BEGIN SELECT RAISE(ABORT, 'batches: DELETE refused'); END",
    f"CREATE TRIGGER batch_outcomes_on_flagged BEFORE INSERT ON batch_outcomes "
    f"WHEN NOT COALESCE({_ON_FLAGGED}, 0) BEGIN SELECT RAISE(ABORT, '{_FLAGGED}'); END",
    *[
        f"CREATE TRIGGER {table}_no_{name.lower()} BEFORE {name} ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} is append-only: {name} refused'); END"
        for table in APPEND_ONLY
        for name in ("UPDATE", "DELETE")
    ],
]

_POSTGRES = [
    f"""CREATE FUNCTION latentdesk_batch_update() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF TG_OP = 'DELETE' THEN
            RAISE EXCEPTION 'batches: DELETE refused';
        END IF;
        IF {_postgres_changed()} THEN
            RAISE EXCEPTION 'a batch''s content is frozen: UPDATE refused';
        END IF;
        IF NOT COALESCE({_ALLOWED_MOVE}, FALSE) THEN
            RAISE EXCEPTION '{_MOVE}';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER batches_guard BEFORE UPDATE OR DELETE ON batches "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_batch_update()",
    f"""CREATE FUNCTION latentdesk_batch_outcome() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF NOT COALESCE({_ON_FLAGGED}, FALSE) THEN
            RAISE EXCEPTION '{_FLAGGED}';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER batch_outcomes_on_flagged BEFORE INSERT ON batch_outcomes "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_batch_outcome()",
    *[
        f"CREATE TRIGGER {table}_append_only BEFORE UPDATE OR DELETE ON {table} "
        "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()"
        for table in APPEND_ONLY
    ],
    *[
        f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
        "FOR EACH STATEMENT EXECUTE FUNCTION latentdesk_append_only()"
        for table in ("batches", *APPEND_ONLY)
    ],
]


def upgrade() -> None:
    op.create_table(
        "batches",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("reference_model_id", sa.Integer(), nullable=False),
        sa.Column("file_name", sa.String(length=500), nullable=False),
        sa.Column("file_sha256", sa.String(length=64), nullable=False),
        sa.Column("intake_options", sa.JSON(), nullable=False),
        sa.Column("uploaded_by", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("n_samples", sa.Integer(), nullable=False),
        sa.Column("n_flagged", sa.Integer(), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("warnings", sa.JSON(), nullable=False),
        sa.Column("retest", sa.Boolean(), nullable=False),
        sa.Column("reviewed_at", sa.DateTime(), nullable=True),
        sa.CheckConstraint("state IN ('open', 'reviewed')", name=op.f("ck_batches_state")),
        sa.ForeignKeyConstraint(
            ["reference_model_id"], ["reference_models.id"],
            name=op.f("fk_batches_reference_model_id_reference_models"),
        ),
        sa.ForeignKeyConstraint(["uploaded_by"], ["users.id"], name=op.f("fk_batches_uploaded_by_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_batches")),
    )
    op.create_index(op.f("ix_batches_reference_model_id"), "batches", ["reference_model_id"], unique=False)
    op.create_index(op.f("ix_batches_file_sha256"), "batches", ["file_sha256"], unique=False)
    op.create_table(
        "batch_samples",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("batch_id", sa.Integer(), nullable=False),
        sa.Column("reference_model_id", sa.Integer(), nullable=False),
        sa.Column("run_index", sa.Integer(), nullable=False),
        sa.Column("sample_id", sa.String(length=500), nullable=False),
        sa.Column("measured", sa.JSON(), nullable=False),
        sa.Column("scores", sa.JSON(), nullable=False),
        sa.Column("t2", sa.Float(), nullable=False),
        sa.Column("spe", sa.Float(), nullable=False),
        sa.Column("incomplete", sa.Boolean(), nullable=False),
        sa.Column("t2_warning", sa.Boolean(), nullable=False),
        sa.Column("t2_action", sa.Boolean(), nullable=False),
        sa.Column("spe_warning", sa.Boolean(), nullable=False),
        sa.Column("spe_action", sa.Boolean(), nullable=False),
        sa.Column("flagged", sa.Boolean(), nullable=False),
        sa.Column("violations", sa.JSON(), nullable=False),
        sa.ForeignKeyConstraint(["batch_id"], ["batches.id"], name=op.f("fk_batch_samples_batch_id_batches")),
        sa.ForeignKeyConstraint(
            ["reference_model_id"], ["reference_models.id"],
            name=op.f("fk_batch_samples_reference_model_id_reference_models"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_batch_samples")),
        sa.UniqueConstraint("reference_model_id", "run_index", name="uq_batch_samples_run_index"),
    )
    op.create_index(op.f("ix_batch_samples_batch_id"), "batch_samples", ["batch_id"], unique=False)
    op.create_index(
        "ix_batch_samples_reference_model_sample", "batch_samples", ["reference_model_id", "sample_id"], unique=False
    )
    op.create_table(
        "batch_outcomes",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("batch_sample_id", sa.Integer(), nullable=False),
        sa.Column("outcome", sa.String(length=32), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("cause", sa.Text(), nullable=True),
        sa.Column("signer_id", sa.Integer(), nullable=False),
        sa.Column("printed_name", sa.String(length=200), nullable=False),
        sa.Column("signed_at", sa.DateTime(), nullable=False),
        sa.CheckConstraint(
            "outcome IN ('assignable_cause', 'no_cause_accepted', 'rejected')", name=op.f("ck_batch_outcomes_outcome")
        ),
        sa.ForeignKeyConstraint(
            ["batch_sample_id"], ["batch_samples.id"], name=op.f("fk_batch_outcomes_batch_sample_id_batch_samples")
        ),
        sa.ForeignKeyConstraint(["signer_id"], ["users.id"], name=op.f("fk_batch_outcomes_signer_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_batch_outcomes")),
    )
    op.create_index(op.f("ix_batch_outcomes_batch_sample_id"), "batch_outcomes", ["batch_sample_id"], unique=False)
    statements = _POSTGRES if op.get_bind().dialect.name == "postgresql" else _SQLITE
    for statement in statements:
        op.execute(statement)


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        for table in ("batch_outcomes", "batch_samples", "batches"):
            op.execute(f"DROP TABLE {table}")
        for function in ("latentdesk_batch_update", "latentdesk_batch_outcome"):
            op.execute(f"DROP FUNCTION IF EXISTS {function}()")
        return
    for table in ("batch_outcomes", "batch_samples", "batches"):
        op.drop_table(table)  # their triggers go with them
