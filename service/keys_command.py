"""``mixscore keys add|list|revoke``: manage the API keys file without Python."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .auth import SCOPES, new_key, read_keys_file, write_keys_file
from .settings import Settings, SettingsError


def add_parser(commands: argparse._SubParsersAction) -> None:
    keys = commands.add_parser("keys", help="add, list or revoke API keys in the keys file")
    keys.add_argument("--file", help="keys file (default: MIXSCORE_API_KEYS_FILE)")
    actions = keys.add_subparsers(dest="action", required=True)
    add = actions.add_parser("add", help="make a key; its token is printed once")
    add.add_argument("id", help="a name for the key: letters, digits, '-' and '_'")
    add.add_argument("--scopes", default="score",
                     help=f"comma-separated, among {', '.join(SCOPES)} (default: score)")
    actions.add_parser("list", help="the keys' ids and scopes (never secrets)")
    revoke = actions.add_parser("revoke", help="remove a key")
    revoke.add_argument("id")


def run(settings: Settings, args: argparse.Namespace) -> int:
    if not (args.file or settings.api_keys_file):
        raise SettingsError("give --file or set MIXSCORE_API_KEYS_FILE")
    path = Path(args.file or settings.api_keys_file)
    keys = read_keys_file(path)
    if args.action == "list":
        for key in keys:
            print(f"{key.id}\t{','.join(sorted(key.scopes))}")
        return 0
    if args.action == "revoke":
        remaining = [key for key in keys if key.id != args.id]
        if len(remaining) == len(keys):
            print(f"mixscore: no key {args.id!r} in {path}", file=sys.stderr)
            return 1
        write_keys_file(path, remaining)
        print(f"revoked {args.id!r} in {path}", file=sys.stderr)
        return 0
    if any(key.id == args.id for key in keys):
        print(f"mixscore: {path} already has a key {args.id!r}; revoke it first",
              file=sys.stderr)
        return 1
    try:
        token, entry = new_key(args.id, [s.strip() for s in args.scopes.split(",") if s.strip()])
    except ValueError as error:
        print(f"mixscore: {error}", file=sys.stderr)
        return 2
    write_keys_file(path, [*keys, entry])
    print(token)
    print(f"added {args.id!r} ({', '.join(sorted(entry.scopes))}) to {path}; the token above "
          "is shown only now", file=sys.stderr)
    return 0
