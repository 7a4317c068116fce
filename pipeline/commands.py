"""Worklist sub-commands of the cardiosieve CLI: review, yield, audit, replay, export, show, serve.

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
# Kept in step with the screens and pipeline.worklist (tests/test_commands.py checks them).
SCREEN_HELP = "hyperkalemia, long_qt, st_deviation"
STATUS_HELP = "open, reopened, explained, closed"
TIERS = (1, 2, 3, 4)
AUDIT_FORMATS = ("table", "json", "csv", "parquet", "html")
FORMATS = ("text", "json", "csv")
YIELD_FORMATS = ("table", "text", "json", "csv")
REPLAY_FORMATS = ("table", "json", "csv", "html")   # text: the name of table before, still taken
# Kept in step with pipeline.store.YIELD_GROUPS (tests/test_history.py checks it).
YIELD_GROUPS = ("tier", "rule_version")
TEXT_WIDTH = (60, 110)       # text output wraps at the terminal's width, within these bounds


def add_store_options(p: argparse.ArgumentParser, required: bool = False) -> None:
    """--db URL or --out OUT, the one way every store command names its store."""
    where = p.add_mutually_exclusive_group(required=required)
    where.add_argument("--db", metavar="URL",
                       help="SQLAlchemy URL, e.g. sqlite:///out/worklist.sqlite or postgresql+psycopg://...")
    where.add_argument("--out", metavar="OUT", help="output folder: use OUT/worklist.sqlite")


def register(subparsers) -> None:
    """Add the review, yield, audit, replay, export, show and serve sub-commands."""
    p = subparsers.add_parser("review", help="record a review outcome for an item, or import a CSV of them",
                              description="Record a review outcome (closes the item) or import outcomes "
                                          "exported by staff tools (CSV columns: item_id, reviewed_at, "
                                          "reviewer_role, outcome, note). Outcomes: finding_real (the "
                                          "flagged abnormality is there and was news), finding_not_real "
                                          "(it is not there), already_known (there, already known), "
                                          "data_problem (flagged because of wrong or mismatched data). "
                                          "With --missed, record instead a case a screen should have "
                                          "flagged and did not (patient, ECG, screen, role, note, time).",
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
    p.add_argument("--missed", action="store_true",
                   help="record a missed case instead: an ECG a screen should have flagged and did not "
                        "(with --patient, --ecg, --screen, --role; --note and --at as for a review)")
    p.add_argument("--patient", metavar="ID", help="with --missed: the patient")
    p.add_argument("--ecg", metavar="ID", help="with --missed: the ECG the screen missed")
    p.add_argument("--screen", metavar="SCREEN", help=f"with --missed: the screen that missed it ({SCREEN_HELP})")
    add_store_options(p)
    p.set_defaults(handler=handle_review, func=handle_review)

    p = subparsers.add_parser("yield", help="per screen and tier: items, reviewed, finding_real, PPV (95 %% Wilson)",
                              description="Review yield per screen and tier (or rule version), for tuning "
                                          "thresholds. PPV = (finding_real + already_known) / reviewed.")
    add_store_options(p)
    p.add_argument("--since", metavar="DATE", help="only items first flagged at or after DATE (UTC)")
    p.add_argument("--until", metavar="DATE", help="only items first flagged before DATE (UTC)")
    p.add_argument("--by", default="tier", choices=YIELD_GROUPS,
                   help="group each screen by tier (default) or by rule_version: the rule version an "
                        "item was reviewed under (its current one while not reviewed)")
    p.add_argument("--format", default="table", choices=YIELD_FORMATS,
                   help="table (default; text is the same), json or csv")
    p.set_defaults(handler=handle_yield, func=handle_yield)

    p = subparsers.add_parser("audit", help="missed-findings audit: review timeliness, findings with no "
                                            "follow-up in the lake, yield per rule version",
                              description="For quality improvement, over [--since, --until): of the items "
                                          "first flagged, how many were reviewed, reviewed later than the "
                                          "site's target for their tier, or not reviewed and overdue (hours "
                                          "from first flagged to first review); with --lake, the findings "
                                          "with no follow-up in the lake (a severe potassium with no repeat, "
                                          "an ST elevation with no repeat ECG or troponin, a QTc above 500 ms "
                                          "followed by a QT-prolonging dose); and the review yield per rule "
                                          "version. Counts only unless --items. See docs/audit.md.")
    add_store_options(p)
    p.add_argument("--since", metavar="DATE", required=True, help="first day of the period (UTC), e.g. 2026-11-01")
    p.add_argument("--until", metavar="DATE", help="end of the period, excluded (UTC; default: now)")
    p.add_argument("--config", help="site configuration (TOML): its [audit] targets and follow-up windows, "
                                    "lab codes and drug classes")
    p.add_argument("--lake", metavar="LAKE", help="the lake, for the follow-up rules (without it they are "
                                                  "reported as not assessed)")
    p.add_argument("--items", action="store_true",
                   help="also list each item and finding with its item, ECG and patient id (for the analyst; "
                        "without it the report holds counts only)")
    p.add_argument("--format", default="table", choices=AUDIT_FORMATS,
                   help="table (default) or json on standard output; csv or parquet files in the --output "
                        "folder; html: one offline file with plots (--output FILE)")
    p.add_argument("--output", "-o", metavar="PATH", help="the folder (csv, parquet) or file (html) to write")
    p.set_defaults(handler=handle_audit, func=handle_audit)

    p = subparsers.add_parser("replay", help="threshold what-if: re-screen aligned history under other "
                                             "thresholds, against the reviews (never touches the worklist)",
                              description="For quality improvement: re-screen the ECGs acquired in [--since, "
                                          "--until) from the aligned archive (OUT/aligned_history; the lake for "
                                          "days it does not cover) under the site's rules and under the site's "
                                          "rules plus the overrides of --rules, and compare findings, would-be "
                                          "items per day, the reviewed items kept, lost and gained, PPV (95 % "
                                          "Wilson) and recorded missed cases. Counts only, unless --items. "
                                          "Reads the store, never writes it. See docs/replay.md.")
    p.add_argument("--out", required=True, metavar="OUT", help="output folder: its aligned archive and, without "
                                                               "--db, its worklist.sqlite")
    p.add_argument("--lake", required=True, metavar="LAKE", help="the lake, for days the archive does not cover")
    p.add_argument("--config", metavar="TOML", help="site configuration (its [rules.*] are the current rules)")
    p.add_argument("--db", metavar="URL", help="SQLAlchemy URL of the worklist store (default: OUT/worklist.sqlite)")
    p.add_argument("--since", required=True, metavar="DATE", help="first instant of the period (UTC), e.g. 2026-01-01")
    p.add_argument("--until", metavar="DATE", help="end of the period, excluded (UTC; default: now)")
    p.add_argument("--rules", required=True, metavar="WHATIF_TOML",
                   help="the alternative: [rules.<screen>] tables of threshold overrides, as in the site config")
    p.add_argument("--sweep", metavar="SCREEN.KEY=LO:HI:STEP",
                   help="also re-screen that screen with the threshold at each value LO, LO+STEP, ..., HI")
    p.add_argument("--items", action="store_true",
                   help="also list item-level rows (item, ECG and patient ids gained or lost): identifies patients")
    p.add_argument("--format", default="table", choices=REPLAY_FORMATS, help="table (default), json, csv or html "
                                                                             "(html needs --output)")
    p.add_argument("--output", "-o", metavar="FILE", help="write the report to FILE (owner-only) instead of "
                                                          "standard output")
    p.set_defaults(handler=handle_replay, func=handle_replay)

    p = subparsers.add_parser("export", help="write the stored worklist as CSV for spreadsheets")
    add_store_options(p)
    p.add_argument("--format", default="csv", choices=["csv"], help="output format (csv)")
    p.add_argument("--output", "-o", metavar="FILE", default="-", help="file to write (default: standard output)")
    p.set_defaults(handler=handle_export, func=handle_export)

    p = subparsers.add_parser("show", help="print the ranked worklist, or one item in full, for a person to read",
                              description="Print the ranked worklist head (each item's id, rank, tier, screen, "
                                          "status, score, patient, sex and age, care location, ECG time, the "
                                          "whole summary and its caveats), or with ITEM_ID one item in full: "
                                          "criteria met with thresholds and sources, values, prior ECG, "
                                          "episode and reviews. Times in the site's time zone with their "
                                          "offset. Shows patient identifiers: for a person at a screen, not "
                                          "for logs.")
    p.add_argument("item_id", nargs="?", metavar="ITEM_ID", help="show this item in full")
    add_store_options(p)
    p.add_argument("--limit", type=int, default=20, help="items to list (default 20)")
    p.add_argument("--screen", action="append", metavar="SCREEN",
                   help=f"only this screen ({SCREEN_HELP}); repeat for several")
    p.add_argument("--tier", action="append", type=int, choices=TIERS, metavar="TIER",
                   help="only this tier (1 most urgent .. 4); repeat for several")
    p.add_argument("--status", action="append", metavar="STATUS",
                   help=f"only this status ({STATUS_HELP}); repeat for several (default: all but closed)")
    p.add_argument("--location", metavar="TEXT", help="only items whose care location contains TEXT "
                                                       "(case-insensitive)")
    p.add_argument("--include-closed", action="store_true", help="also list items already reviewed")
    _add_time_zone_options(p)
    p.add_argument("--format", default="text", choices=FORMATS, help="text (default), json or csv")
    p.add_argument("--html", metavar="FILE", help="write the worklist and each listed item's page (plots "
                                                  "included) into one offline HTML file instead; needs --out "
                                                  "(the night's aligned and criterion tables)")
    p.add_argument("--lake", metavar="LAKE", help="with --html: the lake, for each patient's results over 72 h "
                                                  "and the prior ECG's leads (read with --config)")
    p.set_defaults(handler=handle_show, func=handle_show)

    p = subparsers.add_parser("serve", help="start the review page: the worklist and items in a browser",
                              description="Start the review page (a small web application) over the worklist "
                                          "store: the worklist with filters, each item with its criteria and "
                                          "plots, and a form to record reviews. It has no login: it listens "
                                          "on 127.0.0.1 unless --host says otherwise; put it behind the "
                                          "site's authenticating proxy. Shows patient identifiers.")
    p.add_argument("--out", required=True, metavar="OUT", help="output folder: its published night (aligned, "
                                                               "criterion tables) and, without --db, its worklist.sqlite")
    p.add_argument("--db", metavar="URL", help="SQLAlchemy URL of the worklist store (default: OUT/worklist.sqlite)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1: this machine only)")
    p.add_argument("--port", type=int, default=8750, help="port (default 8750)")
    p.add_argument("--lake", metavar="LAKE", help="the lake, for each patient's results over 72 h and the prior "
                                                  "ECG's leads (read with --config)")
    _add_time_zone_options(p)
    p.set_defaults(handler=handle_serve, func=handle_serve)


def _add_time_zone_options(p: argparse.ArgumentParser) -> None:
    zone = p.add_mutually_exclusive_group()
    zone.add_argument("--config", metavar="TOML", help="site configuration: its [site] timezone is used for times")
    zone.add_argument("--timezone", metavar="TZ", help="IANA time zone for times (default: the site's, else UTC)")


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
    if args.missed:
        return _record_missed(args, url)
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


def _record_missed(args, url: str) -> int:
    from cardiosieve.pipeline.store import record_missed_case

    if args.item_id or args.outcome or args.import_csv:
        return _fail("review --missed: give --patient, --ecg, --screen and --role, not an item, "
                     "--outcome or --import-csv")
    if not (args.patient and args.ecg and args.screen and args.role):
        return _fail("review --missed: --patient, --ecg, --screen and --role are required")
    import pandas as pd

    engine = _store(url)
    try:
        at = pd.Timestamp(args.at) if args.at else pd.Timestamp.now(tz="UTC")   # time of entry
        recorded = record_missed_case(engine, args.patient, args.ecg, args.screen, args.role, args.note, at)
    except BadInputError:
        raise
    except ValueError as exc:
        return _fail(str(exc))
    print("missed case recorded" if recorded else "missed case already recorded")
    return EXIT_OK


PPV_NOTE = ("ppv = (finding_real + already_known) / reviewed, by each item's latest review; "
            "95 % Wilson score interval. missed_of_screen: missed cases recorded for the screen "
            "(the screen's count on each of its rows).")


def handle_yield(args) -> int:
    from cardiosieve.pipeline.store import yield_table

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    try:
        table = yield_table(_store(url), since=args.since, until=args.until, by=args.by)
    except BadInputError:
        raise
    except ValueError:                     # a date pandas cannot read
        return _fail("yield: --since/--until: not a date (ISO 8601, e.g. 2026-03-01)")
    if args.format == "json":
        from cardiosieve.pipeline.jsontext import plain
        _print_json({"caution": CAUTION, "ppv": PPV_NOTE, "rows": plain(table.to_dict("records"))})
        return EXIT_OK
    if args.format == "csv":
        table.to_csv(sys.stdout, index=False, lineterminator="\n")
        return EXIT_OK
    import pandas as pd

    shown = pd.DataFrame({
        "screen": table["screen"], args.by: table[args.by], "items": table["items"], "reviewed": table["reviewed"],
        "finding_real": table["finding_real"], "already_known": table["already_known"],
        "ppv": [_num(x, ".2f") for x in table["ppv"]],
        "ppv_95ci": ["-" if lo != lo else f"{lo:.2f}-{hi:.2f}" for lo, hi in zip(table["ppv_low"], table["ppv_high"])],
        "median_h_to_review": [_num(x, ".1f") for x in table["median_hours_to_review"]],
        "missed_of_screen": table["missed_cases_of_screen"]})
    window = (f" since {args.since}" if args.since else "") + (f" before {args.until}" if args.until else "")
    print(shown.to_string(index=False) if len(shown) else "no items flagged" + window)
    print(PPV_NOTE)
    return EXIT_OK


AUDIT_NOTE = ("late: reviewed after the target for its tier; overdue: not reviewed and past the target when "
              "the audit ran; pending: not reviewed, still within it; hours from first flagged to the first "
              "review (docs/audit.md)")
FOLLOW_UP_NOTE = ("to_review: the window passed and the lake holds no follow-up (for qt_drug_after: a "
                  "QT-prolonging dose was given in it); as_expected: the follow-up is there (for qt_drug_after: no "
                  "dose); window_open: not yet known; not_assessed: an input is missing, unknown (docs/audit.md). "
                  "A question for review, never a verdict on care.")


def handle_audit(args) -> int:
    import pandas as pd

    from cardiosieve.pipeline import audit, followup
    from cardiosieve.pipeline.config import load_settings
    from cardiosieve.pipeline.run import RunError, parse_instant
    from cardiosieve.pipeline.store import read_finding_history, read_items_between, read_reviews, yield_table

    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    now = pd.Timestamp.now(tz="UTC")
    try:                                   # a date without offset is UTC, as for `run`
        since = parse_instant(args.since, "since")
        until = parse_instant(args.until, "until") if args.until else now
    except RunError:
        return _fail("audit: --since/--until: not a date (ISO 8601, e.g. 2026-11-01)")
    if until <= since:
        return _fail("audit: the period is empty (--until is not after --since)")
    if args.format in ("csv", "parquet", "html") and not args.output:
        return _fail(f"audit: --format {args.format} writes files: give --output "
                     f"{'FILE' if args.format == 'html' else 'FOLDER'}")
    if args.lake and not Path(args.lake).is_dir():
        return _fail("audit: --lake: not a folder")
    settings = load_settings(args.config)
    targets = settings.review_target_h()
    engine = _store(url)
    try:
        items = read_items_between(engine, since, until)
        reviews = read_reviews(engine, items["item_id"])
        by_version = yield_table(engine, since=since, until=until, by="rule_version")
        if args.lake:
            findings = followup.latest_findings(read_finding_history(engine, since, until, with_texts=True),
                                                read_items_between(engine, since, until, column="ecg_at"))
    finally:
        engine.dispose()
    per_item = audit.timeliness_items(items, reviews, targets, as_of=now)
    timeliness = audit.review_timeliness(items, reviews, targets, as_of=now)
    checks = None
    if args.lake:
        cands = followup.follow_up_candidates(findings, settings.audit)
        checks = followup.check_follow_ups(cands, followup.read_follow_up_inputs(args.lake, settings, cands), now)
    follow_up = followup.follow_up_summary(checks) if checks is not None else None
    report = {"timeliness": timeliness, "follow_up": follow_up, "yield_by_rule_version": by_version}
    if args.items:
        report["timeliness_items"] = per_item
        report["follow_up_items"] = checks
    period = f"[{since:%Y-%m-%d %H:%M}, {until:%Y-%m-%d %H:%M}) UTC"
    if args.format == "json":
        from cardiosieve.pipeline.jsontext import plain
        _print_json({"caution": CAUTION, "period": period, "note": AUDIT_NOTE, "follow_up_note": FOLLOW_UP_NOTE,
                     "targets_h": targets, "follow_up_settings": {k: v for k, v in settings.audit.items()
                                                                  if k.startswith("follow_up_")},
                     **{k: None if v is None else plain(v.to_dict("records")) for k, v in report.items()}})
        return EXIT_OK
    if args.format in ("csv", "parquet"):
        return _write_audit_files(report, Path(args.output), args.format)
    if args.format == "html":
        _write_text(Path(args.output), _audit_html(report, per_item, targets, period, settings))
        print(f"cardiosieve audit: wrote {args.output}")
        return EXIT_OK
    _print_audit(report, period)
    return EXIT_OK


def _write_text(path: Path, text: str) -> None:
    from cardiosieve.pipeline.files import write_text_atomic
    write_text_atomic(text, path)


def _write_audit_files(report: dict, folder: Path, fmt: str) -> int:
    """One file per part of the report, audit_<part>.<fmt>, in `folder` (made if missing); a
    part that was not computed (the follow-ups without --lake) has no file."""
    from cardiosieve.pipeline.files import private_dir, write_parquet_atomic
    from cardiosieve.pipeline.store import spreadsheet_safe_frame

    private_dir(folder)
    for name, frame in report.items():
        if frame is None:
            continue
        path = folder / f"audit_{name}.{fmt}"
        if fmt == "parquet":
            write_parquet_atomic(frame.reset_index(drop=True), path)
        else:
            _write_text(path, spreadsheet_safe_frame(frame).to_csv(index=False, lineterminator="\n"))
        print(f"cardiosieve audit: wrote {path}")
    return EXIT_OK


def _print_audit(report: dict, period: str) -> None:
    shown = report["timeliness"].copy()
    for c in ("target_h", "median_h_to_review", "p90_h_to_review"):
        shown[c] = [_num(x, ".1f") for x in shown[c]]
    print(CAUTION)
    print(f"Review timeliness: items first flagged in {period}")
    print(shown.to_string(index=False) if len(shown) else "no items flagged in the period")
    print(AUDIT_NOTE)
    print()
    print(f"Follow-up in the lake: findings on ECGs acquired in {period}")
    f = report["follow_up"]
    if f is None:
        print("not assessed: no --lake given")
    else:
        print(f.to_string(index=False) if len(f) else "no finding a follow-up rule applies to in the period")
        print(FOLLOW_UP_NOTE)
    print()
    y = report["yield_by_rule_version"]
    print("Review yield per rule version (as `cardiosieve yield --by rule_version`)")
    if len(y):
        y = y.assign(ppv=[_num(x, ".2f") for x in y["ppv"]],
                     ppv_95ci=["-" if lo != lo else f"{lo:.2f}-{hi:.2f}" for lo, hi in zip(y["ppv_low"], y["ppv_high"])])
        print(y[["screen", "rule_version", "items", "reviewed", "ppv", "ppv_95ci"]].to_string(index=False))
    else:
        print("no items flagged in the period")
    for name in ("timeliness_items", "follow_up_items"):
        if report.get(name) is not None:
            print()
            print(f"{name.replace('_', ' ')}:")
            print(report[name].to_string(index=False) if len(report[name]) else "none")


def _audit_html(report: dict, per_item, targets: dict, period: str, settings) -> str:
    """The audit as one offline HTML file: each part's plot and its table (pages.report_page)."""
    from cardiosieve.pipeline import plots
    from cardiosieve.pipeline.pages import report_page

    f = report["follow_up"]
    y = report["yield_by_rule_version"]
    sections = [
        {"heading": "Time to first review by tier", "anchor": "timeliness", "frame": report["timeliness"],
         "note": AUDIT_NOTE, "empty": "no items flagged in the period",
         "svg": plots.svg_review_hours(per_item, targets),
         "alt": "hours from first flagged to first review, a box per tier, the tier's target dashed"},
        {"heading": "Follow-up in the lake: findings to review, by month", "anchor": "follow-up", "frame": f,
         "note": FOLLOW_UP_NOTE if f is not None else "not assessed: the audit was run without --lake",
         "empty": "no finding a follow-up rule applies to in the period" if f is not None else "not assessed",
         "svg": plots.svg_follow_up_by_month(f) if f is not None else "",
         "alt": "findings to review, per follow-up rule and month (one hatch per rule)"},
        {"heading": "PPV per rule version", "anchor": "yield", "frame": y, "empty": "no items flagged in the period",
         "note": "PPV = (finding_real + already_known) / reviewed, with its 95 % Wilson interval, per the rule "
                 "version an item was reviewed under.",
         "svg": plots.svg_ppv_by_version(y) if len(y) else "",
         "alt": "PPV with its 95 % Wilson interval per screen and rule version"},
    ]
    for name in ("timeliness_items", "follow_up_items"):
        if report.get(name) is not None:
            sections.append({"heading": name.replace("_", " "), "anchor": name, "frame": report[name],
                             "note": "Item-level rows (--items): they name items and patients.", "empty": "none"})
    intro = [f"Period: {period}.", f"Site configuration: {settings.source}.",
             "A missed or late review, or a finding with no follow-up in the lake, is a question for the "
             "team's own review process under local protocols, never a verdict on care: the follow-up may "
             "have happened outside the lake's feeds."]
    return report_page("Missed-findings audit", intro, sections)


def handle_replay(args) -> int:
    import pandas as pd

    from cardiosieve.pipeline import replayview
    from cardiosieve.pipeline.config import load_settings
    from cardiosieve.pipeline.replay import alternative_settings, parse_sweep, read_whatif, replay
    from cardiosieve.pipeline.run import RunError, parse_instant, site_rules

    if args.format == "html" and not args.output:
        return _fail("replay: --format html writes one file: give --output FILE")
    now = pd.Timestamp.now(tz="UTC")
    try:                                   # a date without offset is UTC, as for `run`
        since = parse_instant(args.since, "since")
        until = parse_instant(args.until, "until") if args.until else now
    except RunError:
        return _fail("replay: --since/--until: not a date (ISO 8601, e.g. 2026-11-01)")
    if until <= since:
        return _fail("replay: the period is empty (--until is not after --since)")
    if not Path(args.out).is_dir():
        return _fail(f"replay: no output folder {args.out}")
    if not Path(args.lake).is_dir():
        return _fail(f"replay: no lake folder {args.lake}")
    settings = load_settings(args.config)
    overrides = read_whatif(args.rules)
    label = Path(args.rules).name
    sweep = None
    if args.sweep:
        sweep = parse_sweep(args.sweep, site_rules(alternative_settings(settings, overrides, label)))
    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    engine = _store(url)
    try:
        report = replay(args.out, args.lake, since, until, settings, overrides, label, engine,
                        sweep=sweep, with_items=args.items)
    finally:
        engine.dispose()
    if args.format == "json":
        text = replayview.as_json(report)
    elif args.format == "csv":
        text = replayview.as_csv(report)
    elif args.format == "html":
        text = replayview.as_html(report, now.strftime("%Y-%m-%d %H:%M UTC"))
    else:
        text = replayview.as_text(report)
    if args.output:
        from cardiosieve.pipeline.files import write_text_atomic
        try:
            write_text_atomic(text, args.output)
        except FileNotFoundError:
            return _fail(f"replay: --output {args.output}: its folder does not exist")
        print(f"wrote the replay report to {args.output}", file=sys.stderr)
    else:
        sys.stdout.write(text)
    return EXIT_OK


def _num(x, fmt: str) -> str:
    """A number for a text table; NaN (nothing to count from) shows as "-"."""
    return "-" if x != x else format(x, fmt)


def _print_json(obj) -> None:
    import json
    json.dump(obj, sys.stdout, ensure_ascii=False, allow_nan=False, indent=1)
    sys.stdout.write("\n")


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


def _time_zone(args) -> str:
    """--timezone, else the site configuration's [site] timezone, else UTC (checked: exit 2)."""
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    if args.timezone:
        try:
            ZoneInfo(args.timezone)
        except (ZoneInfoNotFoundError, ValueError):
            raise BadInputError(f"--timezone {args.timezone!r} is not a known IANA time zone") from None
        return args.timezone
    if args.config:
        from cardiosieve.pipeline.config import load_settings
        return load_settings(args.config).timezone or "UTC"
    return "UTC"


def _width() -> int:
    import shutil
    lo, hi = TEXT_WIDTH
    return max(lo, min(hi, shutil.get_terminal_size((100, 24)).columns))


def handle_show(args) -> int:
    """The store's items, as reviews left them: OUT/worklist.parquet is the night's copy, so an
    item reviewed this morning would still show open there."""
    from cardiosieve.pipeline import itemview
    from cardiosieve.pipeline.store import read_items
    from cardiosieve.pipeline.worklist import STATUSES
    from cardiosieve.screens import SCREENS

    unknown_screens = sorted(set(args.screen or ()) - set(SCREENS))
    if unknown_screens:
        return _fail(f"show: unknown --screen {', '.join(unknown_screens)} (known: {', '.join(SCREENS)})")
    unknown_statuses = sorted(set(args.status or ()) - set(STATUSES))
    if unknown_statuses:
        return _fail(f"show: unknown --status {', '.join(unknown_statuses)} (known: {', '.join(STATUSES)})")
    tz = _time_zone(args)
    url = _url(args)
    if url is None:
        return EXIT_BAD_INPUT
    engine = _store(url)
    if args.html:
        return _show_html(args, url, tz)
    if args.item_id:
        return _show_one(engine, args, tz)
    stored = read_items(engine)
    matching = itemview.select_items(stored, screens=args.screen, tiers=args.tier, statuses=args.status,
                                     include_closed=args.include_closed)
    matching = itemview.at_location(itemview.dress(matching), args.location)
    head = matching.head(max(args.limit, 0))
    if args.format == "json":
        _print_json({"caution": CAUTION, "timezone": tz, "stored": len(stored), "matching": len(matching),
                     "items": itemview.as_records(head, tz)})
        return EXIT_OK
    if args.format == "csv":
        from cardiosieve.pipeline.store import spreadsheet_safe_frame
        spreadsheet_safe_frame(itemview.csv_frame(head, tz)).to_csv(sys.stdout, index=False, lineterminator="\n")
        return EXIT_OK
    print(CAUTION)
    print()
    print(itemview.format_list(head, tz, _width()))
    print(f"{len(head)} of {len(matching)} matching items shown ({len(stored)} stored); times in {tz}; "
          f"`show ITEM_ID` gives one item in full")
    return EXIT_OK


def _show_html(args, url: str, tz: str) -> int:
    """show --html FILE: the worklist and each listed item's page in one offline file (0600)."""
    import pandas as pd
    from cardiosieve.pipeline.files import write_atomic
    from cardiosieve.pipeline.pages import ReviewData, snapshot_page

    if not args.out:
        return _fail("show --html: give --out OUT (its published night holds the data the plots draw)")
    if args.item_id or (args.screen and len(args.screen) > 1) or (args.tier and len(args.tier) > 1) \
            or (args.status and len(args.status) > 1):
        return _fail("show --html: takes at most one --screen, --tier and --status, and no ITEM_ID")
    data = ReviewData(url, args.out, lake=args.lake, config=args.config, timezone=tz)
    filters = {"tier": args.tier[0] if args.tier else None, "screen": args.screen[0] if args.screen else None,
               "status": args.status[0] if args.status else None, "location": args.location, "date": None}
    made_at = pd.Timestamp.now(tz=tz).strftime("%Y-%m-%d %H:%M %z")
    text, n = snapshot_page(data, filters, made_at, limit=max(args.limit, 0))
    write_atomic(args.html, lambda tmp: tmp.write_text(text, encoding="utf-8"))
    print(f"wrote {n} items to {args.html}", file=sys.stderr)
    return EXIT_OK


def handle_serve(args) -> int:
    from cardiosieve.pipeline.pages import ReviewData
    from cardiosieve.pipeline.store import sqlite_url
    from cardiosieve.pipeline.webapp import serve

    if not Path(args.out).is_dir():
        return _fail(f"serve: no output folder {args.out}")
    if not (0 <= args.port <= 65535):
        return _fail(f"serve: --port {args.port} is not a port number")
    url = args.db or sqlite_url(args.out)
    _store(url)             # a missing or unusable store is exit 2 now, not a page later
    data = ReviewData(url, args.out, lake=args.lake, config=args.config, timezone=_time_zone(args))
    print(f"cardiosieve review page on http://{args.host}:{args.port}/ (Ctrl-C stops it). {CAUTION}", file=sys.stderr)
    serve(data, host=args.host, port=args.port)
    return EXIT_OK


def _show_one(engine, args, tz: str) -> int:
    from cardiosieve.pipeline import itemview
    from cardiosieve.pipeline.store import read_items, read_reviews

    found = read_items(engine, item_ids=[args.item_id])
    if found.empty:
        return _fail(f"show: no item {args.item_id} in the store")
    dressed = itemview.dress(found)
    reviews = read_reviews(engine, [args.item_id])
    if args.format == "json":
        record = itemview.as_records(dressed, tz)[0]
        from cardiosieve.pipeline.jsontext import plain
        record["reviews"] = plain(reviews.assign(
            reviewed_at=reviews["reviewed_at"].dt.tz_convert(tz)).to_dict("records"))
        _print_json({"caution": CAUTION, "timezone": tz, "item": record})
        return EXIT_OK
    if args.format == "csv":
        return _fail("show ITEM_ID: --format csv lists items; use text or json for one item")
    print(itemview.format_item(dressed.iloc[0], reviews, tz, _width()))
    return EXIT_OK
