"""reference models: signed, frozen models for checking new batches

Revision ID: 0003_reference_models
Revises: 0002_review_guards
Create Date: 2026-12-08

Two tables (see webapp/store/tables.py): ``reference_models`` and
``reference_model_signatures``. The database itself refuses what the app never
does, like 0002 does for exclusions:

- a reference model is inserted only as ``proposed``, never deleted, and its
  defining columns (name, version, note, dataset, model, fingerprint, training
  SHA-256, confidences, variables, limits, training, the open model file and
  its SHA-256, proposer, creation time) never change;
- its state moves only proposed -> approved | rejected (with a decision
  signature of that meaning) and approved -> retired (with a retirement
  signature, or superseded by a later approved version of the same name);
- signatures are append-only, one per step, and never by the proposer
  (four-eyes principle); a decision is signed only while the model is
  proposed, a retirement only while it is approved.

SQLite: ``BEFORE`` triggers with ``RAISE(ABORT, ...)``; PostgreSQL: trigger
functions that raise an exception. (US FDA 21 CFR Part 11, 11.10(e) and
11.70; EU GMP Annex 11, 2011, section 14.)
"""
from alembic import op
import sqlalchemy as sa


revision = "0003_reference_models"
down_revision = "0002_review_guards"
branch_labels = None
depends_on = None

FROZEN = (
    "id", "name", "version", "note", "dataset_id", "model_id", "fingerprint", "training_sha256",
    "warning_confidence", "action_confidence", "variables", "limits", "training", "document",
    "document_sha256", "proposed_by", "created_at",
)
JSON_COLUMNS = ("variables", "limits", "training", "document")

_FOUR_EYES = "the proposer cannot sign their own reference model; a second reviewer must"
_MOVES = (
    "a reference model moves only proposed -> approved | rejected and approved -> retired, "
    "each with its signature"
)

# The condition under which an UPDATE of reference_models is allowed (both engines' SQL).
_ALLOWED_MOVE = """(
    (OLD.state = 'proposed' AND NEW.state IN ('approved', 'rejected')
     AND NEW.decided_at IS NOT NULL AND NEW.retired_at IS NULL AND NEW.superseded_by IS NULL
     AND EXISTS (SELECT 1 FROM reference_model_signatures s
                 WHERE s.reference_model_id = OLD.id AND s.step = 'decision' AND s.meaning = NEW.state))
    OR
    (OLD.state = 'approved' AND NEW.state = 'retired'
     AND NEW.decided_at = OLD.decided_at AND NEW.retired_at IS NOT NULL
     AND (
        (NEW.superseded_by IS NULL
         AND EXISTS (SELECT 1 FROM reference_model_signatures s
                     WHERE s.reference_model_id = OLD.id AND s.step = 'retirement'))
        OR EXISTS (SELECT 1 FROM reference_models r JOIN reference_model_signatures s
                          ON s.reference_model_id = r.id AND s.step = 'decision' AND s.meaning = 'approved'
                   WHERE r.id = NEW.superseded_by AND r.name = OLD.name AND r.version > OLD.version)
     ))
)"""

_SIGNATURE_ALLOWED = """(
    NEW.signer_id <> (SELECT proposed_by FROM reference_models WHERE id = NEW.reference_model_id)
)"""
_SIGNATURE_IN_STATE = """(
    (NEW.step = 'decision'
     AND (SELECT state FROM reference_models WHERE id = NEW.reference_model_id) = 'proposed')
    OR (NEW.step = 'retirement'
     AND (SELECT state FROM reference_models WHERE id = NEW.reference_model_id) = 'approved')
)"""
_INSERTED_PROPOSED = (
    "NEW.state = 'proposed' AND NEW.decided_at IS NULL AND NEW.retired_at IS NULL AND NEW.superseded_by IS NULL"
)


def _sqlite_changed() -> str:
    return " OR ".join(f"NEW.{c} IS NOT OLD.{c}" for c in FROZEN)


def _postgres_changed() -> str:
    def side(prefix):
        return ", ".join(f"{prefix}.{c}::text" if c in JSON_COLUMNS else f"{prefix}.{c}" for c in FROZEN)

    return f"ROW({side('NEW')}) IS DISTINCT FROM ROW({side('OLD')})"


_SQLITE = [
    "CREATE TRIGGER reference_models_insert_proposed BEFORE INSERT ON reference_models "
    f"WHEN NOT ({_INSERTED_PROPOSED}) "
    "BEGIN SELECT RAISE(ABORT, 'a reference model starts as proposed'); END",
    "CREATE TRIGGER reference_models_frozen BEFORE UPDATE ON reference_models "
    f"WHEN {_sqlite_changed()} "
    "BEGIN SELECT RAISE(ABORT, 'a reference model''s content is frozen: UPDATE refused'); END",
    "CREATE TRIGGER reference_models_moves BEFORE UPDATE ON reference_models "
    f"WHEN NOT {_ALLOWED_MOVE} "
    f"BEGIN SELECT RAISE(ABORT, '{_MOVES}'); END",
    "CREATE TRIGGER reference_models_no_delete BEFORE DELETE ON reference_models "
    "BEGIN SELECT RAISE(ABORT, 'reference_models: DELETE refused'); END",
    "CREATE TRIGGER reference_model_signatures_four_eyes BEFORE INSERT ON reference_model_signatures "
    f"WHEN NOT {_SIGNATURE_ALLOWED} "
    f"BEGIN SELECT RAISE(ABORT, '{_FOUR_EYES}'); END",
    "CREATE TRIGGER reference_model_signatures_in_state BEFORE INSERT ON reference_model_signatures "
    f"WHEN NOT {_SIGNATURE_IN_STATE} "
    "BEGIN SELECT RAISE(ABORT, 'a decision is signed on a proposed reference model, "
    "a retirement on an approved one'); END",
    *[
        f"CREATE TRIGGER reference_model_signatures_no_{name.lower()} BEFORE {name} ON reference_model_signatures "
        f"BEGIN SELECT RAISE(ABORT, 'reference_model_signatures is append-only: {name} refused'); END"
        for name in ("UPDATE", "DELETE")
    ],
]

_POSTGRES = [
    f"""CREATE FUNCTION latentdesk_reference_model_insert() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF NOT ({_INSERTED_PROPOSED}) THEN
            RAISE EXCEPTION 'a reference model starts as proposed';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER reference_models_insert_proposed BEFORE INSERT ON reference_models "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_reference_model_insert()",
    f"""CREATE FUNCTION latentdesk_reference_model_update() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF TG_OP = 'DELETE' THEN
            RAISE EXCEPTION 'reference_models: DELETE refused';
        END IF;
        IF {_postgres_changed()} THEN
            RAISE EXCEPTION 'a reference model''s content is frozen: UPDATE refused';
        END IF;
        IF NOT COALESCE({_ALLOWED_MOVE}, FALSE) THEN
            RAISE EXCEPTION '{_MOVES}';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER reference_models_guard BEFORE UPDATE OR DELETE ON reference_models "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_reference_model_update()",
    f"""CREATE FUNCTION latentdesk_reference_model_signature() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF NOT COALESCE({_SIGNATURE_ALLOWED}, FALSE) THEN
            RAISE EXCEPTION '{_FOUR_EYES}';
        END IF;
        IF NOT COALESCE({_SIGNATURE_IN_STATE}, FALSE) THEN
            RAISE EXCEPTION 'a decision is signed on a proposed reference model, a retirement on an approved one';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER reference_model_signatures_four_eyes BEFORE INSERT ON reference_model_signatures "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_reference_model_signature()",
    "CREATE TRIGGER reference_model_signatures_append_only BEFORE UPDATE OR DELETE ON reference_model_signatures "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()",
    *[
        f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
        "FOR EACH STATEMENT EXECUTE FUNCTION latentdesk_append_only()"
        for table in ("reference_models", "reference_model_signatures")
    ],
]


def upgrade() -> None:
    op.create_table(
        "reference_models",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=200), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("note", sa.Text(), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("dataset_id", sa.Integer(), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("fingerprint", sa.String(length=64), nullable=False),
        sa.Column("training_sha256", sa.String(length=64), nullable=False),
        sa.Column("warning_confidence", sa.Float(), nullable=False),
        sa.Column("action_confidence", sa.Float(), nullable=False),
        sa.Column("variables", sa.JSON(), nullable=False),
        sa.Column("limits", sa.JSON(), nullable=False),
        sa.Column("training", sa.JSON(), nullable=False),
        sa.Column("document", sa.JSON(), nullable=False),
        sa.Column("document_sha256", sa.String(length=64), nullable=False),
        sa.Column("proposed_by", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("decided_at", sa.DateTime(), nullable=True),
        sa.Column("retired_at", sa.DateTime(), nullable=True),
        sa.Column("superseded_by", sa.Integer(), nullable=True),
        sa.CheckConstraint(
            "state IN ('proposed', 'approved', 'rejected', 'retired')", name=op.f("ck_reference_models_state")
        ),
        sa.CheckConstraint(
            "warning_confidence > 0 AND warning_confidence < action_confidence AND action_confidence < 1",
            name=op.f("ck_reference_models_confidence"),
        ),
        sa.CheckConstraint("version >= 1", name=op.f("ck_reference_models_version")),
        sa.ForeignKeyConstraint(["dataset_id"], ["datasets.id"], name=op.f("fk_reference_models_dataset_id_datasets")),
        sa.ForeignKeyConstraint(["model_id"], ["models.id"], name=op.f("fk_reference_models_model_id_models")),
        sa.ForeignKeyConstraint(["proposed_by"], ["users.id"], name=op.f("fk_reference_models_proposed_by_users")),
        sa.ForeignKeyConstraint(
            ["superseded_by"], ["reference_models.id"],
            name=op.f("fk_reference_models_superseded_by_reference_models"),
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_reference_models")),
        sa.UniqueConstraint("name", "version", name="uq_reference_models_name_version"),
    )
    op.create_index(op.f("ix_reference_models_dataset_id"), "reference_models", ["dataset_id"], unique=False)
    op.create_index(op.f("ix_reference_models_state"), "reference_models", ["state"], unique=False)
    op.create_index(
        "ix_reference_models_one_approved_per_name", "reference_models", ["name"], unique=True,
        sqlite_where=sa.text("state = 'approved'"), postgresql_where=sa.text("state = 'approved'"),
    )
    op.create_table(
        "reference_model_signatures",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("reference_model_id", sa.Integer(), nullable=False),
        sa.Column("step", sa.String(length=16), nullable=False),
        sa.Column("signer_id", sa.Integer(), nullable=False),
        sa.Column("printed_name", sa.String(length=200), nullable=False),
        sa.Column("meaning", sa.String(length=16), nullable=False),
        sa.Column("comment", sa.Text(), nullable=False),
        sa.Column("signed_at", sa.DateTime(), nullable=False),
        sa.CheckConstraint(
            "meaning IN ('approved', 'rejected', 'retired')", name=op.f("ck_reference_model_signatures_meaning")
        ),
        sa.CheckConstraint(
            "(step = 'decision' AND meaning IN ('approved', 'rejected')) "
            "OR (step = 'retirement' AND meaning = 'retired')",
            name=op.f("ck_reference_model_signatures_step"),
        ),
        sa.ForeignKeyConstraint(
            ["reference_model_id"], ["reference_models.id"],
            name=op.f("fk_reference_model_signatures_reference_model_id_reference_models"),
        ),
        sa.ForeignKeyConstraint(["signer_id"], ["users.id"], name=op.f("fk_reference_model_signatures_signer_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_reference_model_signatures")),
        sa.UniqueConstraint("reference_model_id", "step", name="uq_reference_model_signatures_step"),
    )
    op.create_index(
        op.f("ix_reference_model_signatures_reference_model_id"), "reference_model_signatures",
        ["reference_model_id"], unique=False,
    )
    statements = _POSTGRES if op.get_bind().dialect.name == "postgresql" else _SQLITE
    for statement in statements:
        op.execute(statement)


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        op.execute("DROP TABLE reference_model_signatures")
        op.execute("DROP TABLE reference_models")
        for function in ("latentdesk_reference_model_insert", "latentdesk_reference_model_update",
                         "latentdesk_reference_model_signature"):
            op.execute(f"DROP FUNCTION IF EXISTS {function}()")
        return
    op.drop_table("reference_model_signatures")  # its triggers go with it
    op.drop_table("reference_models")
