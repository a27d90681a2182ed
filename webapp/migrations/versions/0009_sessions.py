"""user_sessions: every browser sign-in as a database row; login attempts say whether a password was checked

Revision ID: 0009_sessions
Revises: 0008_oidc_identities
Create Date: 2026-12-12

A new table ``user_sessions`` holds one row per browser sign-in
(``webapp.auth.sessions``): the SHA-256 of the random secret the signed cookie
carries (never the secret), when it started and was last used, the browser's
user agent (truncated) and the client address, and when and why it ended.
Every request checks its row, so a sign-out, a password change, a disabled
account or an idle timeout holds on every worker and host at once (OWASP
Session Management Cheat Sheet; NIST SP 800-63B, 2017, section 7.1).

``login_attempts.evaluated`` records whether the attempt's password was
checked (False: refused by a lockout before that). Rows from before this
revision keep NULL: whether they were checked is not known.
"""
from alembic import op
import sqlalchemy as sa


revision = "0009_sessions"
down_revision = "0008_oidc_identities"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "user_sessions",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("secret_hash", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("last_seen_at", sa.DateTime(), nullable=False),
        sa.Column("user_agent", sa.String(length=200), nullable=False),
        sa.Column("client_addr", sa.String(length=64), nullable=False),
        sa.Column("revoked_at", sa.DateTime(), nullable=True),
        sa.Column("revoked_reason", sa.String(length=64), nullable=True),
        sa.ForeignKeyConstraint(["user_id"], ["users.id"], name=op.f("fk_user_sessions_user_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_user_sessions")),
        sa.UniqueConstraint("secret_hash", name=op.f("uq_user_sessions_secret_hash")),
    )
    op.create_index(op.f("ix_user_sessions_user_id"), "user_sessions", ["user_id"], unique=False)
    op.create_index(op.f("ix_user_sessions_created_at"), "user_sessions", ["created_at"], unique=False)
    op.add_column("login_attempts", sa.Column("evaluated", sa.Boolean(), nullable=True))


def downgrade() -> None:
    op.execute("ALTER TABLE login_attempts DROP COLUMN evaluated")  # SQLite 3.35 and later, PostgreSQL
    op.drop_index(op.f("ix_user_sessions_created_at"), table_name="user_sessions")
    op.drop_index(op.f("ix_user_sessions_user_id"), table_name="user_sessions")
    op.drop_table("user_sessions")
