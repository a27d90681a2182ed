"""The hash-chained logs, and the queries each of them needs: the review log and the admin log.

Both are append-only tables (database triggers refuse UPDATE and DELETE:
migrations 0002_review_guards and 0010_account_admin) with a one-row chain head
that records the last entry. ``ChainLog`` names the two tables of one log; every
query here takes it, so the hashing and verifying code (``webapp.services.audit``)
is written once for both.

``lock`` serialises the writers of a log across processes: PostgreSQL
``SELECT ... FOR UPDATE`` on the log's chain head row, SQLite ``BEGIN IMMEDIATE``
(the database's write lock, taken at the start of the transaction).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterator

from sqlalchemy import func, inspect, select, update
from sqlalchemy.orm import Session

from webapp.store.engine import add_and_flush
from webapp.store.tables import AdminLogEntry, AdminLogHead, ReviewLogEntry, ReviewLogHead


@dataclass(frozen=True)
class ChainLog:
    """One hash-chained log: its name for messages, its entry table and its chain head table."""

    name: str
    entries: type
    head: type


REVIEW_LOG = ChainLog("review log", ReviewLogEntry, ReviewLogHead)
ADMIN_LOG = ChainLog("admin log", AdminLogEntry, AdminLogHead)


def lock(session: Session, log: ChainLog) -> None:
    """Take ``log``'s write lock for the rest of this transaction (call it first)."""
    connection = session.connection()
    if connection.dialect.name == "sqlite":
        if not connection.connection.dbapi_connection.in_transaction:
            connection.exec_driver_sql("BEGIN IMMEDIATE")
        return
    session.execute(select(log.head.id).where(log.head.id == 1).with_for_update())


def exists(session: Session, log: ChainLog) -> bool:
    """Whether the database holds ``log``'s tables (an older schema may not)."""
    return inspect(session.connection()).has_table(log.entries.__tablename__)


def chain_head(session: Session, log: ChainLog):
    return session.get(log.head, 1, populate_existing=True)


def move_chain_head(session: Session, log: ChainLog, old_seq: int, new_seq: int, new_hash: str) -> bool:
    """Move the head from ``old_seq`` to the new entry; False if someone moved it meanwhile."""
    result = session.execute(
        update(log.head)
        .where(log.head.id == 1, log.head.seq == old_seq)
        .values(seq=new_seq, hash=new_hash)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1


def insert_entry(session: Session, log: ChainLog, **fields: Any):
    return add_and_flush(session, log.entries(**fields))


def iter_entries(session: Session, log: ChainLog, batch: int = 1000) -> Iterator[Any]:
    """Every entry in ``seq`` order, fetched in batches (a log can be long)."""
    table, last = log.entries, 0
    while True:
        rows = list(session.scalars(select(table).where(table.seq > last).order_by(table.seq).limit(batch)))
        if not rows:
            return
        yield from rows
        last = rows[-1].seq


def count_entries(session: Session, log: ChainLog) -> int:
    return session.scalar(select(func.count()).select_from(log.entries)) or 0


def entry_at(session: Session, log: ChainLog, seq: int):
    """The entry with sequence number ``seq``, or None when there is none."""
    return session.scalar(select(log.entries).where(log.entries.seq == seq))


def newest_entries(session: Session, log: ChainLog, *, offset: int, limit: int) -> list[Any]:
    """One page of entries, newest first."""
    table = log.entries
    return list(session.scalars(select(table).order_by(table.seq.desc()).offset(offset).limit(limit)))
