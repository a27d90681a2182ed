"""review integrity: the database refuses an exclusion sign-off by the proposer

Revision ID: 0007_review_integrity
Revises: 0006_hash_scheme
Create Date: 2026-12-12

0002_review_guards made sign-offs append-only, but left the four-eyes rule
(a proposer never signs their own proposal) to the service.  Here the database
enforces it too, as 0003_reference_models does for reference-model signatures:
a trigger compares the new sign-off's ``signer_id`` with the proposal's
``proposed_by`` and refuses the insert when they are the same (or when the
proposal is not there).  Existing rows are not touched.

SQLite: a ``BEFORE INSERT`` trigger with ``RAISE(ABORT, ...)``; PostgreSQL: a
trigger function that raises an exception.  (US FDA 21 CFR Part 11, 11.10(e)
and 11.70; EU GMP Annex 11, 2011, section 14.)
"""
from alembic import op


revision = "0007_review_integrity"
down_revision = "0006_hash_scheme"
branch_labels = None
depends_on = None

_FOUR_EYES = "the proposer cannot sign their own proposal; a second reviewer must"
_SIGNER_IS_NOT_PROPOSER = (
    "(NEW.signer_id <> (SELECT proposed_by FROM exclusion_proposals WHERE id = NEW.proposal_id))"
)

_SQLITE = [
    "CREATE TRIGGER sign_offs_four_eyes BEFORE INSERT ON sign_offs "
    f"WHEN NOT COALESCE({_SIGNER_IS_NOT_PROPOSER}, 0) "
    f"BEGIN SELECT RAISE(ABORT, '{_FOUR_EYES}'); END",
]

_POSTGRES = [
    f"""CREATE FUNCTION latentdesk_sign_off_four_eyes() RETURNS trigger LANGUAGE plpgsql AS $$
    BEGIN
        IF NOT COALESCE({_SIGNER_IS_NOT_PROPOSER}, FALSE) THEN
            RAISE EXCEPTION '{_FOUR_EYES}';
        END IF;
        RETURN NEW;
    END $$""",
    "CREATE TRIGGER sign_offs_four_eyes BEFORE INSERT ON sign_offs "
    "FOR EACH ROW EXECUTE FUNCTION latentdesk_sign_off_four_eyes()",
]


def upgrade() -> None:
    statements = _POSTGRES if op.get_bind().dialect.name == "postgresql" else _SQLITE
    for statement in statements:
        op.execute(statement)


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        op.execute("DROP TRIGGER IF EXISTS sign_offs_four_eyes ON sign_offs")
        op.execute("DROP FUNCTION IF EXISTS latentdesk_sign_off_four_eyes()")
        return
    op.execute("DROP TRIGGER IF EXISTS sign_offs_four_eyes")
