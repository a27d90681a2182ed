"""The platform sub-commands of ``latentdesk``: serve, demo, users, tokens.

Every change to an account or a token is written to the admin log with the
actor ``cli (<OS user>)`` (``webapp.services.admin_log``).

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
        print(f"{user['name']}\t{user['role']}\t{state}\t{user['printed_name']}"
              + f"\tlast sign-in {_when(user['last_sign_in'])}"
              + (f"\t{user['failed_sign_ins']} failed sign-in(s)" if user["failed_sign_ins"] else "")
              + (f"\tlocked until {_when(user['locked_until'])}" if user["locked_until"] else "")
              + ("\tmust choose a new password" if user["must_change_password"] else ""))
    return EXIT_OK


def _cmd_users_disable(args: argparse.Namespace) -> int:
    from webapp.services.accounts import disable_user

    revoked = disable_user(args.name)
    print(f"user {args.name} disabled; {revoked} API token(s) revoked")
    return EXIT_OK


def _cmd_users_enable(args: argparse.Namespace) -> int:
    from webapp.services.accounts import enable_user

    enable_user(args.name)
    print(f"user {args.name} enabled (API tokens revoked when it was disabled stay revoked)")
    return EXIT_OK


def _cmd_users_set_role(args: argparse.Namespace) -> int:
    from webapp.services.accounts import set_role

    old = set_role(args.name, args.role)
    print(f"user {args.name}: role {old} -> {args.role}")
    return EXIT_OK


def _cmd_users_reset_password(args: argparse.Namespace) -> int:
    from webapp.services.accounts import reset_password

    password = reset_password(args.name)
    print(f"user {args.name} one-time password {password}")
    print("Hand it over now: it is shown only once. The user must choose a new password at the next sign-in;"
          " their browser sessions have ended.", file=sys.stderr)
    return EXIT_OK


def _cmd_users_unlock(args: argparse.Namespace) -> int:
    from webapp.services.accounts import unlock_user

    failures = unlock_user(args.name)
    print(f"user {args.name} unlocked ({failures} failed sign-in(s) cleared)")
    return EXIT_OK


def _cmd_tokens_create(args: argparse.Namespace) -> int:
    from webapp.services.accounts import create_token

    print(create_token(args.name, args.label or "", expires=args.expires, read_only=args.read_only))
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
        print(f"{token['id']}\t{token['user']}\t{token['label'] or '-'}\t{token['scope']}\tcreated "
              f"{_when(token['created_at'])}\texpires {_when(token['expires_at']) if token['expires_at'] else 'never'}"
              f"\tlast used {_when(token['last_used_at'])}\t{state}")
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
    enable = users.add_parser("enable", help="let a disabled user sign in again")
    enable.add_argument("name")
    enable.set_defaults(handler=_cmd_users_enable)
    set_role = users.add_parser("set-role", help="give a user another role (the last active admin stays admin)")
    set_role.add_argument("name")
    set_role.add_argument("role", choices=ROLES)
    set_role.set_defaults(handler=_cmd_users_set_role)
    reset = users.add_parser("reset-password", help="print a one-time password; the user chooses a new one "
                             "at the next sign-in")
    reset.add_argument("name")
    reset.set_defaults(handler=_cmd_users_reset_password)
    unlock = users.add_parser("unlock", help="clear a user's failed sign-ins and lock")
    unlock.add_argument("name")
    unlock.set_defaults(handler=_cmd_users_unlock)

    tokens = commands.add_parser("tokens", help="manage API tokens").add_subparsers(
        dest="tokens_command", required=True, metavar="ACTION"
    )
    create = tokens.add_parser("create", help="print a new API token for a user (shown once)")
    create.add_argument("name")
    create.add_argument("--label", help="what the token is for (default: command line)")
    create.add_argument("--expires", metavar="DAYS|YYYY-MM-DD",
                        help="stop working after this many days, or after this day (UTC); default: never")
    create.add_argument("--read-only", action="store_true", help="the token may only read (GET and HEAD)")
    create.set_defaults(handler=_cmd_tokens_create)
    revoke = tokens.add_parser("revoke", help="revoke a user's tokens (all, or one with --id)")
    revoke.add_argument("name")
    revoke.add_argument("--id", type=int, help="revoke only this token id (see 'tokens list')")
    revoke.set_defaults(handler=_cmd_tokens_revoke)
    listing = tokens.add_parser("list", help="list tokens (never their values)")
    listing.add_argument("name", nargs="?")
    listing.set_defaults(handler=_cmd_tokens_list)
