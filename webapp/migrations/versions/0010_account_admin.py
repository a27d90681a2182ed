"""account administration: forced password change, unlock, token expiry and scope, the admin log

Revision ID: 0010_account_admin
Revises: 0009_sessions
Create Date: 2026-12-14

- ``users.must_change_password``: set when an administrator resets a password or
  hands out a first one; until the user chooses their own, every request but that
  one is refused (``webapp.auth.guard_request``). Existing users get false.
- ``users.unlocked_at``: when an administrator last unlocked the account; failed
  sign-ins before it no longer count toward any lockout of that name.
- ``api_tokens.expires_at`` (NULL: never expires; existing tokens keep that) and
  ``api_tokens.scope``, ``read-only`` (GET and HEAD only) or ``read-write``
  (existing tokens keep ``read-write``, what they could do before).
- ``admin_log`` and its one-row chain head ``admin_log_head``: every account change,
  hash-chained as the review log is (``webapp.services.audit``). The database
  refuses UPDATE and DELETE on the log (and TRUNCATE on PostgreSQL), moving the head
  backwards and deleting it, as 0002_review_guards does for the review log
  (US FDA 21 CFR Part 11, 11.10(e): audit trails that never obscure earlier entries).
"""
from alembic import op
import sqlalchemy as sa


revision = "0010_account_admin"
down_revision = "0009_sessions"
branch_labels = None
depends_on = None

GENESIS_HASH = "0" * 64
SCOPES = ("read-only", "read-write")

_SQLITE = [
    *[
        f"CREATE TRIGGER admin_log_no_{op_name.lower()} BEFORE {op_name} ON admin_log "
        f"BEGIN SELECT RAISE(ABORT, 'admin_log is append-only: {op_name} refused'); END"
        for op_name in ("UPDATE", "DELETE")
    ],
    "CREATE TRIGGER admin_log_head_forward BEFORE UPDATE ON admin_log_head "
    "WHEN NEW.seq <= OLD.seq OR NEW.id <> OLD.id "
    "BEGIN SELECT RAISE(ABORT, 'admin_log_head only moves forward'); END",
    "CREATE TRIGGER admin_log_head_no_delete BEFORE DELETE ON admin_log_head "
    "BEGIN SELECT RAISE(ABORT, 'admin_log_head cannot be deleted'); END",
]

_POSTGRES = [
    # latentdesk_append_only() is 0002_review_guards' function; it names the table it guards.
    "CREATE TRIGGER admin_log_append_only BEFORE UPDATE OR DELETE ON admin_log "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_append_only()",
    *[
        f"CREATE TRIGGER {table}_no_truncate BEFORE TRUNCATE ON {table} "
        "FOR EACH STATEMENT EXECUTE FUNCTION latentdesk_append_only()"
        for table in ("admin_log", "admin_log_head")
    ],
    """CREATE FUNCTION latentdesk_chain_head_forward() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF TG_OP = 'DELETE' THEN
            RAISE EXCEPTION '% cannot be deleted', TG_TABLE_NAME;
        END IF;
        IF NEW.seq <= OLD.seq OR NEW.id <> OLD.id THEN
            RAISE EXCEPTION '% only moves forward', TG_TABLE_NAME;
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER admin_log_head_forward BEFORE UPDATE OR DELETE ON admin_log_head "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_chain_head_forward()",
]


def upgrade() -> None:
    op.add_column("users", sa.Column("must_change_password", sa.Boolean(), nullable=False,
                                     server_default=sa.false()))
    op.add_column("users", sa.Column("unlocked_at", sa.DateTime(), nullable=True))
    op.add_column("api_tokens", sa.Column("expires_at", sa.DateTime(), nullable=True))
    # Column and named CHECK in one statement: the same SQL on SQLite (no ALTER TABLE ... ADD
    # CONSTRAINT there) and PostgreSQL.
    op.execute(
        "ALTER TABLE api_tokens ADD COLUMN scope VARCHAR(16) DEFAULT 'read-write' NOT NULL "
        f"CONSTRAINT ck_api_tokens_scope CHECK (scope IN ({', '.join(repr(s) for s in SCOPES)}))"
    )
    op.create_table(
        "admin_log",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("at", sa.DateTime(), nullable=False),
        sa.Column("actor_id", sa.Integer(), nullable=True),
        sa.Column("actor_name", sa.String(length=200), nullable=False),
        sa.Column("action", sa.String(length=64), nullable=False),
        sa.Column("payload", sa.JSON(), nullable=False),
        sa.Column("prev_hash", sa.String(length=64), nullable=False),
        sa.Column("hash", sa.String(length=64), nullable=False),
        sa.Column("hash_scheme", sa.String(length=32), nullable=False),
        sa.ForeignKeyConstraint(["actor_id"], ["users.id"], name=op.f("fk_admin_log_actor_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_admin_log")),
        sa.UniqueConstraint("seq", name=op.f("uq_admin_log_seq")),
    )
    op.create_table(
        "admin_log_head",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("seq", sa.Integer(), nullable=False),
        sa.Column("hash", sa.String(length=64), nullable=False),
        sa.CheckConstraint("id = 1", name=op.f("ck_admin_log_head_single_row")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_admin_log_head")),
    )
    bind = op.get_bind()
    bind.execute(sa.text("INSERT INTO admin_log_head (id, seq, hash) VALUES (1, 0, :hash)"), {"hash": GENESIS_HASH})
    for statement in _POSTGRES if bind.dialect.name == "postgresql" else _SQLITE:
        op.execute(statement)


def downgrade() -> None:
    bind = op.get_bind()
    if bind.dialect.name == "postgresql":
        op.execute("DROP TABLE admin_log_head")  # its triggers go with it
        op.execute("DROP TABLE admin_log")
        op.execute("DROP FUNCTION IF EXISTS latentdesk_chain_head_forward()")
    else:
        for name in ("admin_log_no_update", "admin_log_no_delete", "admin_log_head_forward",
                     "admin_log_head_no_delete"):
            op.execute(f"DROP TRIGGER IF EXISTS {name}")
        op.execute("DROP TABLE admin_log_head")
        op.execute("DROP TABLE admin_log")
    # SQLite 3.35 and later, PostgreSQL; SQLite keeps no named constraint on a dropped column's behalf.
    for table, column in (("api_tokens", "scope"), ("api_tokens", "expires_at"), ("users", "unlocked_at"),
                          ("users", "must_change_password")):
        op.execute(f"ALTER TABLE {table} DROP COLUMN {column}")
