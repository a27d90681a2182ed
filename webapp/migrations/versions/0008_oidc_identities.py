"""oidc_identities: which OpenID provider account signs in as which user

Revision ID: 0008_oidc_identities
Revises: 0007_review_integrity
Create Date: 2026-12-12

A new table ``oidc_identities`` (see webapp/store/tables.py) links the pair
(issuer, subject) of an ID token to a local user; that pair, never the e-mail
address or user name, identifies the person (OpenID Connect Core 1.0, section
5.7). One pair maps to one user; a user may have several pairs. Local users are
untouched, so downgrade simply drops the table.
"""
from alembic import op
import sqlalchemy as sa


revision = "0008_oidc_identities"
down_revision = "0007_review_integrity"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "oidc_identities",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("issuer", sa.String(length=500), nullable=False),
        sa.Column("subject", sa.String(length=255), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(), nullable=False),
        sa.Column("last_signed_in_at", sa.DateTime(), nullable=True),
        sa.ForeignKeyConstraint(["user_id"], ["users.id"], name=op.f("fk_oidc_identities_user_id_users")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_oidc_identities")),
        sa.UniqueConstraint("issuer", "subject", name="uq_oidc_identities_issuer_subject"),
    )
    op.create_index(op.f("ix_oidc_identities_user_id"), "oidc_identities", ["user_id"], unique=False)


def downgrade() -> None:
    op.drop_index(op.f("ix_oidc_identities_user_id"), table_name="oidc_identities")
    op.drop_table("oidc_identities")
