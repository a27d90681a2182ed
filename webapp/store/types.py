"""Column types shared by the tables: UTC timestamps that survive every engine."""

from __future__ import annotations

from datetime import datetime, timezone

from sqlalchemy import DateTime
from sqlalchemy.types import TypeDecorator


def utcnow() -> datetime:
    """The current time, timezone-aware, in UTC."""
    return datetime.now(timezone.utc)


class UTCDateTime(TypeDecorator):
    """Stores naive UTC, hands back aware UTC datetimes.

    SQLite keeps no time zone; PostgreSQL ``timestamp without time zone`` keeps
    none either. Normalising to UTC on the way in and tagging on the way out
    gives the same value on both engines (common practice).
    """

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to a UTC column; pass an aware datetime")
        return value.astimezone(timezone.utc).replace(tzinfo=None)

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=timezone.utc)
