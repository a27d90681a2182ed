"""hash_scheme: every review-log entry names the canonical JSON its hash was computed under

Revision ID: 0006_hash_scheme
Revises: 0005_batch_arrays
Create Date: 2026-12-10

Entries so far were hashed over a home-made canonical JSON, named ``ld-json-1``
(``analysis.canonical_json``); new entries are hashed over RFC 8785 (JSON
Canonicalization Scheme, Rundgren, Jordan & Erdtman 2020), named ``rfc8785``.
A new column ``review_log.hash_scheme`` records which, entry by entry.

1. Before anything changes, the stored chain is recomputed under ``ld-json-1``
   by the app's one verifier (``webapp.services.audit.verify_entries``) against
   the chain head.  If it does not verify, the upgrade stops naming the first
   broken entry, and the database is left as it was.
2. The column is added as ``NOT NULL DEFAULT 'ld-json-1'``: the database gives
   every existing row the legacy name itself, without an UPDATE, so the
   append-only triggers of 0002_review_guards stay in force throughout (adding a
   column fires no row trigger, on SQLite or PostgreSQL).
3. PostgreSQL then drops the default, so every new row must name its scheme.
   SQLite cannot drop a column default without rebuilding the table, which
   would also drop its triggers; there the default stays, and the app always
   writes the scheme itself.

Downgrade drops the column; it is refused while any entry is hashed under
``rfc8785``, which the code before this revision could not verify.
"""
from alembic import op
import sqlalchemy as sa

from webapp.services.audit import LEGACY_HASH_SCHEME, utc_iso, verify_entries


revision = "0006_hash_scheme"
down_revision = "0005_batch_arrays"
branch_labels = None
depends_on = None

_LOG = sa.table(
    "review_log",
    sa.column("seq", sa.Integer()),
    sa.column("at", sa.DateTime()),
    sa.column("actor_id", sa.Integer()),
    sa.column("actor_name", sa.String()),
    sa.column("action", sa.String()),
    sa.column("dataset_id", sa.Integer()),
    sa.column("payload", sa.JSON()),
    sa.column("prev_hash", sa.String()),
    sa.column("hash", sa.String()),
)
_HEAD = sa.table("review_log_head", sa.column("id", sa.Integer()), sa.column("seq", sa.Integer()),
                 sa.column("hash", sa.String()))


def _legacy_entries(bind):
    """The stored entries in seq order, as ``verify_entries`` reads them, all under the legacy scheme."""
    for row in bind.execute(sa.select(_LOG).order_by(_LOG.c.seq)).mappings():
        yield {**row, "at": utc_iso(row["at"]), "hash_scheme": LEGACY_HASH_SCHEME}


def _check_legacy_chain(bind) -> None:
    head = bind.execute(sa.select(_HEAD.c.seq, _HEAD.c.hash).where(_HEAD.c.id == 1)).mappings().first()
    if head is None:
        raise RuntimeError(
            "migration 0006_hash_scheme refused: the review log has no chain head row (it was deleted outside "
            "the app); nothing was changed"
        )
    ok, first_broken, reason = verify_entries(_legacy_entries(bind), dict(head))
    if not ok:
        raise RuntimeError(
            f"migration 0006_hash_scheme refused: the review log does not verify under its scheme "
            f"{LEGACY_HASH_SCHEME} (first broken entry {first_broken}: {reason}); nothing was changed. "
            "Find out what changed the log, from the backups, before upgrading."
        )


def upgrade() -> None:
    bind = op.get_bind()
    _check_legacy_chain(bind)
    op.add_column(
        "review_log",
        sa.Column("hash_scheme", sa.String(length=32), nullable=False, server_default=LEGACY_HASH_SCHEME),
    )
    if bind.dialect.name == "postgresql":
        op.alter_column("review_log", "hash_scheme", server_default=None)


def downgrade() -> None:
    bind = op.get_bind()
    newer = bind.execute(
        sa.text("SELECT COUNT(*) FROM review_log WHERE hash_scheme <> :legacy"), {"legacy": LEGACY_HASH_SCHEME}
    ).scalar_one()
    if newer:
        raise RuntimeError(
            f"downgrade of 0006_hash_scheme refused: {newer} review-log entries are hashed under another scheme "
            f"than {LEGACY_HASH_SCHEME}, which the older code cannot verify"
        )
    op.execute("ALTER TABLE review_log DROP COLUMN hash_scheme")  # SQLite 3.35 and later, PostgreSQL
