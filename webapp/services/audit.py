"""The review log and the admin log: append-only records chained by SHA-256.

Both logs are hashed and verified by the functions here; the stored-chain ones
take the log (``webapp.store.chain_logs.REVIEW_LOG`` or ``ADMIN_LOG``), the
review log when none is given.  What follows describes the review log; the
admin log (migration 0010_account_admin) is built the same way, without a
dataset column (its entries are hashed with ``dataset_id`` null).

Every entry stores the hash of the entry before it (``prev_hash``) and its own
``hash`` = SHA-256 over canonical JSON of
``{seq, at, actor, action, dataset_id, payload, prev_hash}``, and the name of
the canonical JSON it was hashed under (``hash_scheme``): ``rfc8785`` for new
entries, ``ld-json-1`` for entries written before migration 0006_hash_scheme
(``analysis.canonical_json``).  Verification recomputes each entry under its
own scheme; a legacy entry after an RFC 8785 one is refused.  Editing or
deleting a stored entry breaks the chain at that entry; deleting entries at the
tail is caught by the chain head row, which the app moves forward in the same
transaction as every append.  ``verify_chain`` names the first broken entry.

Appends are serialised across processes so the chain never forks: on
PostgreSQL a transaction-scoped advisory lock, on SQLite ``BEGIN IMMEDIATE``;
``UNIQUE(seq)`` in the database is the last guard.

References: US FDA 21 CFR Part 11, 11.10(e) (secure, time-stamped audit trails
that never obscure earlier entries); EU GMP Annex 11 (2011), section 9.
Canonical JSON: RFC 8785, JSON Canonicalization Scheme (Rundgren, Jordan &
Erdtman 2020), so any RFC 8785 implementation recomputes a hash (docs/design.md,
"The review log").
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from datetime import datetime, timezone
from typing import Any

from analysis.canonical_json import LEGACY_UTF8, RFC8785, CanonicalJSONError, canonical_sha256

GENESIS_HASH = "0" * 64
HASH_SCHEME = RFC8785  # what new entries are hashed under
LEGACY_HASH_SCHEME = LEGACY_UTF8  # entries written before migration 0006_hash_scheme
# Any constant shared by every process; it only names the lock.
_PG_CHAIN_LOCK_KEY = 0x1A7E_4E5C


def json_safe(value: Any) -> Any:
    """Return ``value`` with NaN/inf floats replaced by None and tuples/sets by lists.

    Used on payloads (e.g. a comparison dict) before they are hashed and stored,
    so the stored JSON and the hashed JSON are the same text.
    """
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, (set, frozenset)):
        return sorted(json_safe(v) for v in value)
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):
        return json_safe(value.tolist())  # numpy arrays and scalars
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, datetime):
        return utc_iso(value)
    raise TypeError(f"value of type {type(value).__name__} cannot go into the review log")


def utc_iso(moment: datetime) -> str:
    """ISO 8601 UTC text with microseconds, e.g. ``2026-12-01T21:55:43.123456Z``.

    A naive datetime is taken to be UTC already (SQLite hands timestamps back
    without a zone).
    """
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def now_utc() -> datetime:
    """The current time in UTC, truncated to microseconds (what both databases keep)."""
    return datetime.now(timezone.utc)


def entry_hash(
    *,
    seq: int,
    at: datetime | str,
    actor: Mapping[str, Any],
    action: str,
    dataset_id: int | None,
    payload: Mapping[str, Any],
    prev_hash: str,
    scheme: str = HASH_SCHEME,
) -> str:
    """SHA-256 (hex) of the canonical JSON (under ``scheme``) of one log entry's content."""
    body = {
        "seq": int(seq),
        "at": at if isinstance(at, str) else utc_iso(at),
        "actor": dict(actor),
        "action": action,
        "dataset_id": dataset_id,
        "payload": payload,
        "prev_hash": prev_hash,
    }
    return canonical_sha256(body, scheme)


def actor_of(actor_id: int | None, actor_name: str) -> dict[str, Any]:
    """The ``actor`` member of the hashed body: both the account id and the name."""
    return {"id": actor_id, "name": actor_name}


def verify_entries(
    entries: Iterable[Mapping[str, Any]], head: Mapping[str, Any] | None = None
) -> tuple[bool, int | None, str]:
    """Check a chain of entries given in ``seq`` order.

    Each entry is a mapping with keys seq, at, actor_id, actor_name, action,
    dataset_id, payload, prev_hash, hash, hash_scheme; its hash is recomputed
    under its own ``hash_scheme``, and a legacy scheme is accepted only before
    the first entry hashed under RFC 8785.  ``head`` (optional) is the recorded
    chain head ``{"seq", "hash"}``; it catches entries removed from the end.

    Returns ``(ok, first_broken_seq, reason)``; ``(True, None, "...")`` when intact.
    """
    expected_seq = 1
    prev_hash = GENESIS_HASH
    count = 0
    current_seen = False
    for entry in entries:
        seq = int(entry["seq"])
        if seq != expected_seq:
            if seq > expected_seq:
                missing = (
                    f"entry {expected_seq} is missing"
                    if seq == expected_seq + 1
                    else f"entries {expected_seq}-{seq - 1} are missing"
                )
                return False, expected_seq, f"{missing} (the log jumps to entry {seq})"
            return False, seq, f"entry {seq} appears out of order or twice"
        if entry["prev_hash"] != prev_hash:
            return False, seq, (
                f"entry {seq} does not point at the entry before it "
                f"(stored prev_hash {str(entry['prev_hash'])[:12]}..., expected {prev_hash[:12]}...)"
            )
        scheme = entry["hash_scheme"]
        if scheme not in (HASH_SCHEME, LEGACY_HASH_SCHEME):
            return False, seq, f"entry {seq} names an unknown hashing scheme {scheme!r}"
        if scheme == LEGACY_HASH_SCHEME and current_seen:
            return False, seq, (
                f"entry {seq} claims the legacy hashing scheme {scheme!r} after entries hashed under {HASH_SCHEME}"
            )
        current_seen = current_seen or scheme == HASH_SCHEME
        try:
            recomputed = entry_hash(
                seq=seq,
                at=entry["at"],
                actor=actor_of(entry["actor_id"], entry["actor_name"]),
                action=entry["action"],
                dataset_id=entry["dataset_id"],
                payload=entry["payload"],
                prev_hash=entry["prev_hash"],
                scheme=scheme,
            )
        except CanonicalJSONError as exc:
            return False, seq, f"entry {seq} cannot be hashed under {scheme}: {exc}"
        if recomputed != entry["hash"]:
            return False, seq, f"entry {seq} was changed after it was written (its hash does not match its content)"
        prev_hash = entry["hash"]
        expected_seq += 1
        count += 1
    if head is not None and int(head["seq"]) > 0:
        head_seq = int(head["seq"])
        if head_seq >= expected_seq:
            return False, expected_seq, (
                f"entry {expected_seq} is missing: the chain head records {head_seq} entries, "
                f"the log holds {count}"
            )
        if head_seq < count:
            return False, head_seq + 1, (
                f"entry {head_seq + 1} was added outside the app: the chain head records "
                f"{head_seq} entries, the log holds {count}"
            )
        if head["hash"] != prev_hash:
            return False, head_seq, f"entry {head_seq} does not match the hash recorded in the chain head"
    elif head is not None and count > 0:
        return False, 1, f"the chain head records no entries, the log holds {count}"
    return True, None, f"intact: {count} entries"


# --- the stored chains: the review log and the admin log (``webapp.store.chain_logs``) ------


def _chain(log):
    """``log`` (a ``webapp.store.chain_logs.ChainLog``), the review log when None."""
    from webapp.store.chain_logs import REVIEW_LOG

    return REVIEW_LOG if log is None else log


def append(
    session,
    *,
    actor_id: int | None,
    actor_name: str,
    action: str,
    dataset_id: int | None = None,
    payload: Mapping[str, Any] | None = None,
    log=None,
):
    """Append one entry to ``log`` (the review log by default) inside the caller's transaction.

    Takes the log's write lock first (a no-op when the caller already holds
    it), so the seq and prev_hash read here cannot be taken by anyone else
    before this transaction commits.  Returns the new entry row.  An entry of
    a log without a dataset column (the admin log) is hashed with
    ``dataset_id`` null.
    """
    from webapp.store import chain_logs

    log = _chain(log)
    chain_logs.lock(session, log)
    head = chain_logs.chain_head(session, log)
    if head is None:
        raise RuntimeError(f"the {log.name} has no chain head row; run the database migrations")
    seq, prev_hash = head.seq + 1, head.hash
    at = now_utc()
    body = json_safe(dict(payload or {}))
    digest = entry_hash(
        seq=seq,
        at=at,
        actor=actor_of(actor_id, actor_name),
        action=action,
        dataset_id=dataset_id,
        payload=body,
        prev_hash=prev_hash,
    )
    fields = dict(seq=seq, at=at, actor_id=actor_id, actor_name=actor_name, action=action, payload=body,
                  prev_hash=prev_hash, hash=digest, hash_scheme=HASH_SCHEME)
    if hasattr(log.entries, "dataset_id"):
        fields["dataset_id"] = dataset_id
    elif dataset_id is not None:
        raise ValueError(f"the {log.name} records no dataset")
    row = chain_logs.insert_entry(session, log, **fields)
    if not chain_logs.move_chain_head(session, log, head.seq, seq, digest):
        raise ChainMoved(f"the {log.name} head moved while entry {seq} was being written")
    return row


class ChainMoved(RuntimeError):
    """Another writer appended first; the caller's transaction is rolled back and retried."""


def entry_dict(row) -> dict[str, Any]:
    """A stored log entry as plain data (what ``verify_entries`` and the API read)."""
    return {
        "seq": row.seq,
        "at": utc_iso(row.at),
        "actor_id": row.actor_id,
        "actor_name": row.actor_name,
        "action": row.action,
        "dataset_id": getattr(row, "dataset_id", None),
        "payload": row.payload,
        "prev_hash": row.prev_hash,
        "hash": row.hash,
        "hash_scheme": row.hash_scheme,
    }


def verify_chain(session, log=None) -> tuple[bool, int | None, str]:
    """Recompute the whole stored chain of ``log`` (the review log by default):
    ``(ok, first_broken_seq, reason)``."""
    from webapp.store import chain_logs

    log = _chain(log)
    head = chain_logs.chain_head(session, log)
    if head is None:
        return False, None, "the chain head row is missing (it was deleted outside the app)"
    recorded = {"seq": head.seq, "hash": head.hash}
    return verify_entries((entry_dict(row) for row in chain_logs.iter_entries(session, log)), recorded)


def chain_head_summary(session, log=None) -> dict[str, Any]:
    """The last entry's seq and hash: print it somewhere outside the database to anchor the log."""
    from webapp.store import chain_logs

    head = chain_logs.chain_head(session, _chain(log))
    return {"seq": head.seq, "hash": head.hash} if head is not None else {"seq": None, "hash": None}


def chain_head_record(session, seq: int | None = None, log=None) -> dict[str, Any]:
    """The chain head as the reports and ``latentdesk log head`` print it, to be kept outside the database.

    Keys: ``seq`` and ``hash`` (``chain_head_summary``), ``at`` (UTC time of the entry
    ``seq``; None when the log is empty or that entry is gone) and ``entries`` (how
    many entries the log holds).  With ``seq``, the same for the stored entry ``seq``
    (``hash`` None when there is none), to compare with a head kept earlier: a log
    whose entry ``seq`` is gone or has another hash was truncated or rewritten.
    """
    from webapp.store import chain_logs

    log = _chain(log)
    if seq is None:
        head = chain_head_summary(session, log)
        entry = chain_logs.entry_at(session, log, head["seq"]) if head["seq"] else None
    else:
        entry = chain_logs.entry_at(session, log, seq)
        head = {"seq": seq, "hash": entry.hash if entry is not None else None}
    return {**head, "at": utc_iso(entry.at) if entry is not None else None,
            "entries": chain_logs.count_entries(session, log)}
