"""The platform sub-commands of ``latentdesk``: serve, demo, users, tokens.

Parsing and printing only; the work happens in ``webapp.cli.serve`` and
``webapp.services.accounts``. Bad input raises InputError (exit 2 in ``webapp.cli``).
"""

from __future__ import annotations

import argparse
import sys

from analysis.errors import InputError
from webapp.store.tables import ROLES

EXIT_OK = 0


def _cmd_serve(args: argparse.Namespace) -> int:
    from webapp.cli.serve import serve

    serve(args.host, args.port, args.workers, args.threads)
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from webapp.cli.serve import demo

    demo(args.host, args.port, args.workers)
    return EXIT_OK


def _read_password_stdin() -> str:
    line = sys.stdin.readline()
    password = line.rstrip("\r\n")
    if not password:
        raise InputError("--password-stdin: no password on standard input")
    return password


def _cmd_users_add(args: argparse.Namespace) -> int:
    from webapp.services.accounts import add_user, user_line

    password = _read_password_stdin() if args.password_stdin else None
    made = add_user(args.name, args.role, password, args.display_name)
    if args.password_stdin:
        print(f"user {args.name} ({args.role}) added")
    else:
        print(user_line(args.name, args.role, made))
    return EXIT_OK


def _when(value) -> str:
    return value.strftime("%Y-%m-%d %H:%M UTC") if value else "-"


def _cmd_users_list(args: argparse.Namespace) -> int:
    from webapp.services.accounts import list_users

    for user in list_users():
        state = "active" if user["active"] else "disabled"
        print(f"{user['name']}\t{user['role']}\t{state}\t{user['display_name']}"
              + (f"\tlocked until {_when(user['locked_until'])}" if user["locked_until"] else ""))
    return EXIT_OK


def _cmd_users_disable(args: argparse.Namespace) -> int:
    from webapp.services.accounts import disable_user

    revoked = disable_user(args.name)
    print(f"user {args.name} disabled; {revoked} API token(s) revoked")
    return EXIT_OK


def _cmd_tokens_create(args: argparse.Namespace) -> int:
    from webapp.services.accounts import create_token

    print(create_token(args.name, args.label or ""))
    print("Store this token now: it is shown only once.", file=sys.stderr)
    return EXIT_OK


def _cmd_tokens_revoke(args: argparse.Namespace) -> int:
    from webapp.services.accounts import revoke_tokens

    count = revoke_tokens(args.name, args.id)
    print(f"{count} token(s) of {args.name} revoked")
    return EXIT_OK


def _cmd_tokens_list(args: argparse.Namespace) -> int:
    from webapp.services.accounts import list_tokens

    for token in list_tokens(args.name):
        state = f"revoked {_when(token['revoked_at'])}" if token["revoked_at"] else "live"
        print(f"{token['id']}\t{token['user']}\t{token['label'] or '-'}\tcreated "
              f"{_when(token['created_at'])}\tlast used {_when(token['last_used_at'])}\t{state}")
    return EXIT_OK


def _server_options(parser: argparse.ArgumentParser, workers: int) -> None:
    parser.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    parser.add_argument("--port", type=int, default=8050, help="port (default 8050)")
    parser.add_argument("--workers", type=int, default=workers, help=f"gunicorn worker processes (default {workers})")


def add_platform_commands(commands) -> None:
    """Add serve, demo, users and tokens to the ``latentdesk`` sub-parsers."""
    serve = commands.add_parser("serve", help="run the web app with gunicorn on the configured database")
    _server_options(serve, workers=2)
    serve.add_argument("--threads", type=int, default=4, help="threads per worker (default 4)")
    serve.set_defaults(handler=_cmd_serve)

    demo = commands.add_parser("demo", help="set up a local demo (users, invented datasets) and serve it")
    _server_options(demo, workers=2)
    demo.set_defaults(handler=_cmd_demo)

    users = commands.add_parser("users", help="manage user accounts").add_subparsers(
        dest="users_command", required=True, metavar="ACTION"
    )
    add = users.add_parser("add", help="add a user (prints a random password unless --password-stdin)")
    add.add_argument("name")
    add.add_argument("--role", required=True, choices=ROLES)
    add.add_argument("--display-name", help="printed name shown with signatures (default: NAME)")
    add.add_argument("--password-stdin", action="store_true", help="read the password from standard input")
    add.set_defaults(handler=_cmd_users_add)
    users.add_parser("list", help="list users").set_defaults(handler=_cmd_users_list)
    disable = users.add_parser("disable", help="disable a user and revoke their tokens")
    disable.add_argument("name")
    disable.set_defaults(handler=_cmd_users_disable)

    tokens = commands.add_parser("tokens", help="manage API tokens").add_subparsers(
        dest="tokens_command", required=True, metavar="ACTION"
    )
    create = tokens.add_parser("create", help="print a new API token for a user (shown once)")
    create.add_argument("name")
    create.add_argument("--label", help="what the token is for")
    create.set_defaults(handler=_cmd_tokens_create)
    revoke = tokens.add_parser("revoke", help="revoke a user's tokens (all, or one with --id)")
    revoke.add_argument("name")
    revoke.add_argument("--id", type=int, help="revoke only this token id (see 'tokens list')")
    revoke.set_defaults(handler=_cmd_tokens_revoke)
    listing = tokens.add_parser("list", help="list tokens (never their values)")
    listing.add_argument("name", nargs="?")
    listing.set_defaults(handler=_cmd_tokens_list)
