"""The ``latentdesk backup DIR`` and ``latentdesk restore DIR`` sub-commands.

Parsing and printing only; the work is ``webapp.services.backup``. Both read the site's
configuration (``LATENTDESK_HOME``, ``LATENTDESK_DATABASE_URL``) like ``serve``. ``restore``
exits 1 when, after restoring, a log chain is broken or the log head or a table's row count
differs from the backup's manifest.
"""

from __future__ import annotations

import argparse

EXIT_OK, EXIT_DIFFERS = 0, 1


def _config():
    from webapp.config import load_config

    return load_config(None, require_secret=False)


def _cmd_backup(args: argparse.Namespace) -> int:
    from webapp.services.backup import backup

    manifest = backup(_config(), args.folder)
    database, head = manifest["database"], manifest["review_log_head"]
    print(f"backed up the {database['kind']} database ({database['bytes']:,} bytes) and "
          f"{len(manifest['files'])} uploaded file(s) to {args.folder}; review log: {head['entries']} entries, "
          f"head {head['hash']}")
    return EXIT_OK


def _cmd_restore(args: argparse.Namespace) -> int:
    from webapp.services.backup import restore

    found = restore(_config(), args.folder)
    good = True
    for name, chain in found["chains"].items():
        if chain["intact"]:
            print(f"{name}: {chain['reason']}")
        else:
            good = False
            print(f"{name}: BROKEN at entry {chain['broken_at']}: {chain['reason']}")
    if not found["head_matches"]:
        good = False
        print("review log head DIFFERS from the one the backup recorded")
    if not found["counts_match"]:
        good = False
        print("row counts DIFFER from the backup's manifest")
    rows = sum(found["counts"].values())
    print(f"restored {rows:,} rows in {len(found['counts'])} tables and {found['files']} uploaded file(s) from "
          f"{args.folder}")
    return EXIT_OK if good else EXIT_DIFFERS


def add_backup_commands(commands) -> None:
    """Add ``backup`` and ``restore`` to the ``latentdesk`` sub-parsers."""
    backup = commands.add_parser("backup", help="copy the database and the uploaded files into a new folder")
    backup.add_argument("folder", help="folder to create (must not exist)")
    backup.set_defaults(handler=_cmd_backup)
    restore = commands.add_parser("restore", help="restore a backup into an empty site, then verify the review log")
    restore.add_argument("folder", help="a folder written by 'latentdesk backup'")
    restore.set_defaults(handler=_cmd_restore)
