"""review guards: append-only review log, chain head, frozen sign-offs and decisions

Revision ID: 0002_review_guards
Revises: 0001
Create Date: 2026-12-01

The database itself refuses what the app never does:
- UPDATE, DELETE (and on PostgreSQL TRUNCATE) on ``review_log`` and ``sign_offs``;
- moving the one-row ``review_log_head`` backwards, or deleting it;
- changing a proposal once it has left the state ``proposed``.
SQLite: ``BEFORE`` triggers with ``RAISE(ABORT, ...)``; PostgreSQL: trigger
functions that raise an exception. (US FDA 21 CFR Part 11, 11.10(e): audit
trails that never obscure earlier entries.)
"""
from alembic import op
import sqlalchemy as sa


revision = "0002_review_guards"
down_revision = "0001"
branch_labels = None
depends_on = None

GENESIS_HASH = "0" * 64
APPEND_ONLY = ("review_log", "sign_offs")

_SQLITE = [
    *[
        f"CREATE TRIGGER {table}_no_{op_name.lower()} BEFORE {op_name} ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} is append-only: {op_name} refused'); END"
        for table in APPEND_ONLY
        for op_name in ("UPDATE", "DELETE")
    ],
    "CREATE TRIGGER review_log_head_forward BEFORE UPDATE ON review_log_head "
    "WHEN NEW.seq <= OLD.seq OR NEW.id <> OLD.id "
    "BEGIN SELECT RAISE(ABORT, 'review_log_head only moves forward'); END",
    "CREATE TRIGGER review_log_head_no_delete BEFORE DELETE ON review_log_head "
    "BEGIN SELECT RAISE(ABORT, 'review_log_head cannot be deleted'); END",
    "CREATE TRIGGER exclusion_proposals_decided BEFORE UPDATE ON exclusion_proposals "
    "WHEN OLD.state <> 'proposed' "
    "BEGIN SELECT RAISE(ABORT, 'a decided proposal cannot change'); END",
    "CREATE TRIGGER exclusion_proposals_no_delete BEFORE DELETE ON exclusion_proposals "
    "BEGIN SELECT RAISE(ABORT, 'exclusion_proposals: DELETE refused'); END",
]

_POSTGRES = [
    """CREATE FUNCTION latentdesk_append_only() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        RAISE EXCEPTION '% is append-only: % refused', TG_TABLE_NAME, TG_OP;
    END $$""",
    *[
        f"CREATE TRIGGER {table}_append_only BEFORE UPDATE OR DELETE ON {table} "
        "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()"
        for table in APPEND_ONLY
    ],
    *[
        f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
        "FOR EACH STATEMENT EXECUTE FUNCTION latentdesk_append_only()"
        for table in (*APPEND_ONLY, "review_log_head")
    ],
    """CREATE FUNCTION latentdesk_head_forward() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF TG_OP = 'DELETE' THEN
            RAISE EXCEPTION 'review_log_head cannot be deleted';
        END IF;
        IF NEW.seq <= OLD.seq OR NEW.id <> OLD.id THEN
            RAISE EXCEPTION 'review_log_head only moves forward';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER review_log_head_forward BEFORE UPDATE OR DELETE ON review_log_head "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_head_forward()",
    """CREATE FUNCTION latentdesk_decided_frozen() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF TG_OP = 'DELETE' OR OLD.state <> 'proposed' THEN
            RAISE EXCEPTION 'a decided proposal cannot change (% refused)', TG_OP;
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER exclusion_proposals_decided BEFORE UPDATE OR DELETE ON exclusion_proposals "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_decided_frozen()",
]


def upgrade() -> None:
    op.create_table(
        "review_log_head",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("hash", sa.String(length=64), nullable=False),
        sa.CheckConstraint("id = 1", name=op.f("ck_review_log_head_single_row")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_review_log_head")),
    )
    bind = op.get_bind()
    last = bind.execute(sa.text("SELECT seq, hash FROM review_log ORDER BY seq DESC LIMIT 1")).first()
    seq, digest = (int(last[0]), str(last[1])) if last else (0, GENESIS_HASH)
    bind.execute(
        sa.text("INSERT INTO review_log_head (id, seq, hash) VALUES (1, :seq, :hash)"),
        {"seq": seq, "hash": digest},
    )
    statements = _POSTGRES if bind.dialect.name == "postgresql" else _SQLITE
    for statement in statements:
        op.execute(statement)


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "postgresql":
        for table in APPEND_ONLY:
            op.execute(f"DROP TRIGGER IF EXISTS {table}_append_only ON {table}")
            op.execute(f"DROP TRIGGER IF EXISTS {table}_no_truncate ON {table}")
        op.execute("DROP TRIGGER IF EXISTS exclusion_proposals_decided ON exclusion_proposals")
        op.execute("DROP TABLE review_log_head")
        for function in ("latentdesk_append_only", "latentdesk_head_forward", "latentdesk_decided_frozen"):
            op.execute(f"DROP FUNCTION IF EXISTS {function}()")
        return
    for table in APPEND_ONLY:
        for op_name in ("update", "delete"):
            op.execute(f"DROP TRIGGER IF EXISTS {table}_no_{op_name}")
    op.execute("DROP TRIGGER IF EXISTS exclusion_proposals_decided")
    op.execute("DROP TRIGGER IF EXISTS exclusion_proposals_no_delete")
    op.execute("DROP TABLE review_log_head")
