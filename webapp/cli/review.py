"""The review sub-commands of ``latentdesk``: ``log verify`` and ``log head``.

``latentdesk log verify`` recomputes the hash chains of the review log and of
the admin log (account changes, ``webapp.services.admin_log``) on the
configured database, naming the log and the entry where one breaks, and checks
every record (proposals, sign-offs, reference models, signatures, batches,
batch outcomes) against the review-log entry that wrote it
(``webapp.services.record_audit``): exit 0 when all hold, 1 naming the first
broken entry and every record that differs (table, id, field, entry seq).
``latentdesk log head`` prints the chain head (entry count, last entry, its
hash and UTC time) to be kept outside the database, so a later truncation of
the log can be noticed (docs/design.md, section 6).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any, Callable

from analysis.errors import InputError

EXIT_OK, EXIT_BROKEN = 0, 1


def _read_log(read: Callable[[Any], Any]) -> Any:
    """``read(session)`` on the configured database, which must exist and be migrated; reads only."""
    from webapp.config import load_config
    from webapp.store import engine_session, make_engine
    from webapp.store.engine import current_revision, database_url

    url = database_url(load_config(None, require_secret=False))
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        raise InputError(f"no database at {url[len('sqlite:///'):]} (set LATENTDESK_HOME or LATENTDESK_DATABASE_URL)")
    engine = make_engine(url)
    try:
        if current_revision(engine) is None:
            raise InputError("the database has no LatentDesk tables yet; there is no review log to read")
        with engine_session(engine) as session:
            return read(session)
    finally:
        engine.dispose()


def _chain_state(session, log) -> tuple[bool | None, int | None, str, dict]:
    """``verify_chain`` and the head of ``log``; ``(None, ...)`` when the schema predates that log."""
    from webapp.services import audit
    from webapp.store import chain_logs

    if not chain_logs.exists(session, log):
        return None, None, "", {}
    return (*audit.verify_chain(session, log), audit.chain_head_summary(session, log))


def _print_chain(name: str, state) -> bool:
    """One line on a chain's state; True unless it is broken."""
    intact, broken, reason, head = state
    if intact is None:
        print(f"{name}: not in this database yet (its schema predates migration 0010_account_admin)")
        return True
    if intact:
        print(f"{name} {reason}; chain head {head['hash']}")
        return True
    where = f"entry {broken}" if broken is not None else "the chain head"
    print(f"{name} BROKEN at {where}: {reason}")
    return False


def _cmd_log_verify(args: argparse.Namespace) -> int:
    from webapp.services import record_audit
    from webapp.store.chain_logs import ADMIN_LOG, REVIEW_LOG

    review, admin, (checked, findings) = _read_log(
        lambda session: (_chain_state(session, REVIEW_LOG), _chain_state(session, ADMIN_LOG),
                         record_audit.check_records(session))
    )
    intact = _print_chain("review log", review)
    intact = _print_chain("admin log", admin) and intact
    if findings:
        print(f"records DIFFER from the review log: {len(findings)} finding(s) in {checked} records checked")
        for finding in findings:
            print(f"  {finding}")
    else:
        print(f"records: {checked} checked, each matches the log entry that wrote it")
    return EXIT_OK if intact and not findings else EXIT_BROKEN


def _entry_number(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"an entry number is a whole number from 1, got {text!r}")
    return int(text)


def _cmd_log_head(args: argparse.Namespace) -> int:
    """Print the chain head (or entry ``--entry``); exit 1 when it names no stored entry."""
    from webapp.services import audit

    head = _read_log(lambda session: audit.chain_head_record(session, args.entry))
    found = head["seq"] == 0 or head["at"] is not None
    if args.json:
        print(json.dumps({k: head[k] for k in ("entries", "seq", "hash", "at")}))
    elif head["seq"] is None:
        print(f"review log: {head['entries']} entries; the chain head row is missing (run `latentdesk log verify`)")
    elif not found:
        print(f"review log: {head['entries']} entries; entry {head['seq']} is not in the log "
              "(run `latentdesk log verify`)")
    else:
        what = "chain head entry" if args.entry is None else "entry"
        written = f"written {head['at']} (UTC)" if head["at"] is not None else "the log is empty"
        print(f"review log: {head['entries']} entries; {what} {head['seq']}, hash {head['hash']}, {written}")
    return EXIT_OK if found else EXIT_BROKEN


def add_review_commands(commands) -> None:
    log = commands.add_parser("log", help="the review log")
    log_commands = log.add_subparsers(dest="log_command", required=True, metavar="COMMAND")
    verify = log_commands.add_parser(
        "verify", help="check the hash chains of the review log and the admin log, and every record against "
        "its review-log entry: exit 0 intact, 1 naming the log, its first broken entry and each record that differs"
    )
    verify.set_defaults(handler=_cmd_log_verify)
    head = log_commands.add_parser(
        "head", help="print the chain head (entries, last entry, its hash and UTC time) to keep outside the database"
    )
    head.add_argument("--entry", type=_entry_number, metavar="N",
                      help="print entry N of the current log instead, to compare with a head kept earlier")
    head.add_argument("--json", action="store_true", help="one JSON object: entries, seq, hash, at")
    head.set_defaults(handler=_cmd_log_head)
