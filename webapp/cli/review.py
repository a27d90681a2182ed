"""The review sub-commands of ``latentdesk``: ``log verify``.

``latentdesk log verify`` recomputes the review log's hash chain on the
configured database: exit 0 when intact, 1 with the first broken entry named.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from analysis.errors import InputError

EXIT_OK, EXIT_BROKEN = 0, 1


def _cmd_log_verify(args: argparse.Namespace) -> int:
    from webapp.config import load_config
    from webapp.services import audit
    from webapp.store import engine_session, make_engine
    from webapp.store.engine import current_revision, database_url

    url = database_url(load_config(None, require_secret=False))
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        raise InputError(f"no database at {url[len('sqlite:///'):]} (set LATENTDESK_HOME or LATENTDESK_DATABASE_URL)")
    engine = make_engine(url)
    try:
        if current_revision(engine) is None:
            raise InputError("the database has no LatentDesk tables yet; nothing to verify")
        with engine_session(engine) as session:
            intact, broken, reason = audit.verify_chain(session)
            head = audit.chain_head_summary(session)
    finally:
        engine.dispose()
    if intact:
        print(f"review log {reason}; chain head {head['hash']}")
        return EXIT_OK
    where = f"entry {broken}" if broken is not None else "the chain head"
    print(f"review log BROKEN at {where}: {reason}")
    return EXIT_BROKEN


def add_review_commands(commands) -> None:
    log = commands.add_parser("log", help="the review log")
    log_commands = log.add_subparsers(dest="log_command", required=True, metavar="COMMAND")
    verify = log_commands.add_parser(
        "verify", help="check the review log's hash chain: exit 0 intact, 1 with the first broken entry named"
    )
    verify.set_defaults(handler=_cmd_log_verify)
