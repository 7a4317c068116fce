"""`cardiosieve db`: the store's schema. `db upgrade` applies the migrations of
pipeline/migrations to the store (the nightly `run` does the same when it opens the store);
`db current` prints the store's schema revision.

Every other command that only uses a store leaves its schema alone: on a store behind this
code it exits 2 and names `db upgrade`, so that a schema change happens when someone decides to
make it, after a backup (docs/operations.md), never as a side effect of a review at the ward.
Only the standard library is imported at module level (`cardiosieve --help` stays fast). Output
names revisions and files, never a row value.
"""
from __future__ import annotations

import sys

from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK
from cardiosieve.pipeline.commands import add_store_options


def register(subparsers) -> None:
    """Add `db upgrade` and `db current`."""
    db = subparsers.add_parser("db", help="the worklist store's schema: upgrade it, or print its revision",
                               description="Manage the worklist store's schema (Alembic migrations shipped "
                                           "with cardiosieve). Back the store up before an upgrade.")
    db.set_defaults(handler=lambda args: _usage(db))
    sub = db.add_subparsers(dest="db_command", metavar="DB_COMMAND")

    p = sub.add_parser("upgrade", help="bring the store's schema to this cardiosieve's revision",
                       description="Apply the migrations the store lacks, in one transaction under the store's "
                                   "lock (a store already current is left alone). A store made before these "
                                   "migrations is recognised and recorded without a change. Back it up first.")
    add_store_options(p, required=True)
    p.add_argument("--create", action="store_true",
                   help="make the store if there is none (otherwise a missing store is an error: a typo in "
                        "the path must not make a store somewhere new)")
    p.set_defaults(handler=handle_upgrade)

    p = sub.add_parser("current", help="print the store's schema revision",
                       description="Print the store's schema revision and whether this cardiosieve can use "
                                   "it as it is. Changes nothing.")
    add_store_options(p, required=True)
    p.set_defaults(handler=handle_current)


def _usage(parser) -> int:
    parser.print_help()
    return EXIT_BAD_INPUT


def _url(args) -> str:
    from cardiosieve.pipeline.store import sqlite_url
    return args.db if args.db else sqlite_url(args.out)


def _option(args) -> str:
    """The store as this command was given it, for a hint (never a server URL: it may hold a password)."""
    return f"--out {args.out}" if args.out else "--db URL"


def handle_upgrade(args) -> int:
    from cardiosieve.pipeline.store import upgrade_store

    before, after = upgrade_store(_url(args), create=args.create)
    if before is None:
        print(f"worklist store created at schema revision {after}")
    elif before == after:
        print(f"worklist store already at schema revision {after}")
    else:
        print(f"worklist store upgraded from schema revision {before} to {after}")
    return EXIT_OK


def handle_current(args) -> int:
    from cardiosieve.pipeline.store import HEAD_REVISION, StoreSchemaError, check_known_revision, store_revision

    found, recorded = store_revision(_url(args))
    try:
        check_known_revision(found)
    except StoreSchemaError as exc:
        print(found)
        print(f"cardiosieve: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if found != HEAD_REVISION:
        print(f"{found} (this cardiosieve needs {HEAD_REVISION}: back the store up, then run "
              f"`cardiosieve db upgrade {_option(args)}`)")
    elif not recorded:
        print(f"{found} (current; made before the migrations: the next run or db upgrade records its revision)")
    else:
        print(f"{found} (current)")
    return EXIT_OK
