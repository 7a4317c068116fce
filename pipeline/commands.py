"""Worklist sub-commands of the cardiosieve CLI: review, yield, export, show.

`register(subparsers)` adds them to the CLI's argparse sub-parsers; each sets `handler` (also as
`func`), a function taking the parsed arguments and returning an exit code (pipeline.cli):
0 fine; 2 usage or data error, one line (an error about the store itself, such as a URL of
another database or a store locked by another process, is raised as a BadInputError for the
CLI to print); 3 (EXIT_PARTIAL) `review --import-csv` rejected some lines (each listed; the
good ones were imported). 1 stays the CLI's "internal error". Only the standard library is imported
here at module level: pandas, SQLAlchemy and scipy are imported inside the handlers, so
`cardiosieve --help` stays fast.

Every command here reads the store (OUT/worklist.sqlite, or --db) and none creates one: a
missing SQLite file is an error naming it, not an empty worklist. `show` is the command meant
for a person to view the ranked worklist and may print patient_id. The nightly `run` prints
counts only. Nothing here prints row values to stderr.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK, EXIT_PARTIAL
from cardiosieve.pipeline.errors import BadInputError
# Kept in step with pipeline.store.OUTCOMES (tests/test_commands.py checks it); repeated here
# because this module may not import the store at start-up.
OUTCOME_HELP = "finding_real, finding_not_real, already_known, data_problem"
SHOW_COLUMNS = ["rank", "tier", "screen", "status", "patient_id", "ecg_at", "score", "summary"]
SUMMARY_WIDTH = 70


def _add_store_options(p: argparse.ArgumentParser) -> None:
    where = p.add_mutually_exclusive_group()
    where.add_argument("--db", metavar="URL",
                       help="SQLAlchemy URL, e.g. sqlite:///out/worklist.sqlite or postgresql+psycopg://...")
    where.add_argument("--out", metavar="OUT", help="output folder: use OUT/worklist.sqlite")


def register(subparsers) -> None:
    """Add the review, yield, export and show sub-commands."""
    p = subparsers.add_parser("review", help="record a review outcome for an item, or import a CSV of them",
                              description="Record a review outcome (closes the item) or import outcomes "
                                          "exported by staff tools (CSV columns: item_id, reviewed_at, "
                                          "reviewer_role, outcome, note). Outcomes: finding_real (the "
                                          "flagged abnormality is there and was news), finding_not_real "
                                          "(it is not there), already_known (there, already known), "
                                          "data_problem (flagged because of wrong or mismatched data).",
                              epilog=f"Exit codes: {EXIT_OK} recorded (or already recorded), {EXIT_BAD_INPUT} bad "
                                     f"input (one-line reason; for --import-csv a whole-file error, nothing "
                                     f"imported), {EXIT_PARTIAL} --import-csv rejected some lines (each "
                                     f"listed with its line number; the good lines were imported), 1 "
                                     f"internal error.")
    p.add_argument("item_id", nargs="?", help="the worklist item reviewed")
    p.add_argument("--outcome", help=f"one of: {OUTCOME_HELP}")
    p.add_argument("--role", help="reviewer role (e.g. cardiology registrar), not a name")
    p.add_argument("--note", help="free-text note")
    p.add_argument("--at", metavar="TIME", help="when reviewed (ISO 8601 with offset; default: now)")
    p.add_argument("--import-csv", metavar="FILE", help="import review outcomes from this CSV instead")
    p.add_argument("--timezone", metavar="TZ", help="IANA zone for CSV times written without an offset")
    _add_store_options(p)
    p.set_defaults(handler=handle_review, func=handle_review)

    p = subparsers.add_parser("yield", help="per screen and tier: items, reviewed, finding_real, PPV (95 %% Wilson)",
                              description="Review yield per screen and tier, for tuning thresholds. "
                                          "PPV = (finding_real + already_known) / reviewed.")
    _add_store_options(p)
    p.add_argument("--since", metavar="DATE", help="only items first flagged at or after DATE (UTC)")
    p.set_defaults(handler=handle_yield, func=handle_yield)

    p = subparsers.add_parser("export", help="write the stored worklist as CSV for spreadsheets")
    _add_store_options(p)
    p.add_argument("--format", default="csv", choices=["csv"], help="output format (csv)")
    p.add_argument("--output", "-o", metavar="FILE", default="-", help="file to write (default: standard output)")
    p.set_defaults(handler=handle_export, func=handle_export)

    p = subparsers.add_parser("show", help="print the head of the ranked worklist for a person to read",
                              description="Print the ranked worklist head as a text table. Shows patient "
                                          "identifiers: for a person at a screen, not for logs.")
    _add_store_options(p)
    p.add_argument("--limit", type=int, default=20, help="rows to show (default 20)")
    p.add_argument("--include-closed", action="store_true", help="also show items already reviewed")
    p.set_defaults(handler=handle_show, func=handle_show)


# ---------------------------------------------------------------------------------------------
def _fail(message: str) -> int:
    print(f"cardiosieve: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def _url(args) -> str | None:
    """The store URL from --db or --out; None (after a message) when neither is given or OUT
    holds no store. A --db URL is checked by open_store(url, create=False)."""
    if args.db:
        return args.db
    if args.out:
        path = Path(args.out) / "worklist.sqlite"
        if not path.exists():
            _fail(f"no worklist database at {path}")
            return None
        from cardiosieve.pipeline.store import sqlite_url
        return sqlite_url(args.out)
    _fail("give --db URL or --out OUT")
    return None


def _store(url: str):
    """The existing store at `url`, never a new one (StoreUrlError otherwise, exit 2)."""
    from cardiosieve.pipeline.store import open_store
    return open_store(url, create=False)


def handle_review(args) -> int:
    from cardiosieve.pipeline.store import import_reviews_csv, record_review

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    if args.import_csv:
        if args.item_id or args.outcome:
            return _fail("review: give either ITEM_ID --outcome ... or --import-csv FILE, not both")
        engine = _store(url)
        try:
            counts = import_reviews_csv(engine, args.import_csv, timezone=args.timezone)
        except BadInputError:              # about the store (locked, schema): the CLI's to report
            raise
        except (OSError, ValueError) as exc:
            return _fail(f"review: {exc}")
        print(f"reviews read {counts['read']}, imported {counts['imported']}, "
              f"already recorded {counts['duplicate']}, rejected {counts['rejected']}")
        for r in counts["rejects"]:
            print(f"  rejected line {r['line']}: {r['column']}: {r['reason']}")
        return EXIT_PARTIAL if counts["rejected"] else EXIT_OK
    if not (args.item_id and args.outcome and args.role):
        return _fail("review: ITEM_ID, --outcome and --role are required (or --import-csv FILE)")
    import pandas as pd

    engine = _store(url)
    try:
        at = pd.Timestamp(args.at) if args.at else pd.Timestamp.now(tz="UTC")   # time of entry
        recorded = record_review(engine, args.item_id, args.outcome, args.role, args.note, at)
    except BadInputError:
        raise
    except ValueError as exc:
        return _fail(str(exc))
    print(f"item {args.item_id}: " + ("review recorded, item closed" if recorded else "review already recorded"))
    return EXIT_OK


def format_table(rows: list[list[str]], header: list[str], right: set[str] = frozenset()) -> str:
    """Plain aligned text table (numbers right-aligned)."""
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(header)]
    def line(cells):
        return "  ".join(c.rjust(w) if h in right else c.ljust(w)
                         for c, w, h in zip(cells, widths, header)).rstrip()
    return "\n".join([line(header), line(["-" * w for w in widths])] + [line(r) for r in rows])


def handle_yield(args) -> int:
    from cardiosieve.pipeline.store import yield_table

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    table = yield_table(_store(url), since=args.since)
    header = ["screen", "tier", "items", "reviewed", "finding_real", "already_known", "ppv", "ppv_95ci",
              "median_h_to_review"]
    def num(x, fmt):
        return "-" if x != x else format(x, fmt)   # NaN shows as "-"
    rows = [[r.screen, str(r.tier), str(r.items), str(r.reviewed), str(r.finding_real), str(r.already_known),
             num(r.ppv, ".2f"),
             "-" if r.ppv_low != r.ppv_low else f"{r.ppv_low:.2f}-{r.ppv_high:.2f}",
             num(r.median_hours_to_review, ".1f")] for r in table.itertuples()]
    print(format_table(rows, header, right=set(header) - {"screen", "ppv_95ci"}))
    print("ppv = (finding_real + already_known) / reviewed, by each item's latest review; "
          "95 % Wilson score interval.")
    return EXIT_OK


def handle_export(args) -> int:
    from cardiosieve.pipeline.store import export_items

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    engine = _store(url)
    if args.output == "-":
        export_items(engine, args.format, sys.stdout)
    else:
        n = export_items(engine, args.format, args.output)
        print(f"exported {n} items to {args.output}", file=sys.stderr)
    return EXIT_OK


def handle_show(args) -> int:
    """The store's ranked items, as reviews left them: OUT/worklist.parquet is the night's copy,
    so an item reviewed this morning would still show open there."""
    import pandas as pd

    from cardiosieve.pipeline.store import read_items
    from cardiosieve.pipeline.worklist import STATUS_CLOSED

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    items = read_items(_store(url))

    total = len(items)
    if not args.include_closed:
        items = items[items["status"].ne(STATUS_CLOSED)]
    head = items.sort_values("rank", kind="mergesort").head(max(args.limit, 0))
    rows = []
    for r in head.itertuples():   # at most --limit rows
        summary = str(r.summary)
        summary = summary if len(summary) <= SUMMARY_WIDTH else summary[:SUMMARY_WIDTH - 3] + "..."
        rows.append([str(r.rank), str(r.tier), str(r.screen), str(r.status), str(r.patient_id),
                     pd.Timestamp(r.ecg_at).strftime("%Y-%m-%d %H:%M"), f"{r.score:.3f}", summary])
    print(CAUTION)
    print(format_table(rows, SHOW_COLUMNS, right={"rank", "tier", "score"}))
    print(f"{len(head)} of {len(items)} items shown ({total} stored; times UTC)")
    return EXIT_OK
