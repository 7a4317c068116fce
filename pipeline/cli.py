"""cardiosieve command line.

Only the standard library is imported at start-up, so `cardiosieve --help` answers at once and
each command imports what it uses. Exit codes: 0 success; 2 bad input or configuration, with a
one-line reason; 3 partly done: `review --import-csv` rejected some lines (each listed with its line
number; the good lines were imported); 1 internal error. Output is counts only: it lands in
scheduler logs, so it never carries a patient identifier or a value from a row.
"""
from __future__ import annotations

import argparse
import logging
import sys
from contextlib import contextmanager

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.errors import BadInputError

EXIT_OK, EXIT_INTERNAL, EXIT_BAD_INPUT, EXIT_PARTIAL = 0, 1, 2, 3
EXIT_CODES_HELP = ("Exit codes: 0 success, 2 bad input or configuration (one-line reason; for validate: "
                   "some rows rejected), "
                   "3 review --import-csv rejected some lines (each listed; the good ones were imported), "
                   "1 internal error.")


def _version() -> str:
    """The installed distribution's version (pyproject.toml), or "unknown" from a bare checkout."""
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("cardiosieve")
    except PackageNotFoundError:
        return "unknown (not installed)"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="cardiosieve",
        description="Screen ECG measurements against laboratory results and write a prioritised "
                    "worklist for clinical review. " + CAUTION,
        epilog=EXIT_CODES_HELP)
    p.add_argument("--version", action="version", version=f"cardiosieve {_version()}")
    _verbosity_args(p, argparse.SUPPRESS)
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    run = sub.add_parser("run", help="screen the ECGs acquired in [start, end) and write the worklist",
                         description="Screen the ECGs acquired in [--start, --end) (UTC; a bound without "
                                     "offset is read as UTC) and write OUT/worklist.parquet, "
                                     "OUT/aligned.parquet, OUT/rejects.parquet, OUT/criteria_<screen>.parquet (each "
                                     "screen's criterion table) and OUT/run_summary.json.")
    _lake_args(run)
    run.add_argument("--out", required=True, help="output folder")
    run.add_argument("--start", required=True, help="first instant screened, ISO 8601 (e.g. 2026-11-29)")
    run.add_argument("--end", required=True, help="end of the interval, excluded, ISO 8601 (e.g. 2026-11-30)")
    run.add_argument("--db", help="SQLAlchemy URL of the worklist database (default: sqlite at OUT/worklist.sqlite)")
    run.add_argument("--landing-marker", metavar="NAME", default="",
                     help="file the exporter writes into each ecg/date=... partition once it is complete (e.g. "
                          "_SUCCESS); default: a partition holding a Parquet file has landed. The run stops "
                          "(exit 2) before it starts when a day of [start, end) has not landed")
    run.set_defaults(handler=_cmd_run)

    back = sub.add_parser("backfill", help="screen a long past interval, on this machine or on Apache Spark",
                          description="The job of `run` over a long past interval [--start, --end), in chunks "
                                      "of the lake's ECG rows, with the same outputs. --engine spark spreads the "
                                      "rows over Spark executors by patient (needs the spark extra, pip install "
                                      "'cardiosieve[spark]', and Java 17); see docs/scale-out.md.")
    _lake_args(back)
    back.add_argument("--out", required=True, help="output folder")
    back.add_argument("--start", required=True, help="first instant screened, ISO 8601")
    back.add_argument("--end", required=True, help="end of the interval, excluded, ISO 8601")
    back.add_argument("--db", help="SQLAlchemy URL of the worklist database (default: sqlite at OUT/worklist.sqlite)")
    back.add_argument("--engine", choices=("local", "spark"), default="local",
                      help="local: this process (as `run`); spark: Apache Spark (default: local)")
    back.add_argument("--master", default="local[2]",
                      help="Spark master URL with --engine spark, e.g. local[4] or spark://host:7077 "
                           "(default: local[2])")
    back.add_argument("--buckets", type=int, default=8,
                      help="patient buckets with --engine spark: Spark tasks, each with every row of its "
                           "patients (default: 8)")
    back.set_defaults(handler=_cmd_backfill)

    val = sub.add_parser("validate", help="check the lake against the contract and report rejects",
                         description="Read the lake (or only [--start, --end)) against the data contract; "
                                     "print counts of accepted and rejected rows by reason.",
                         epilog="Exit codes: 0 every row accepted; 2 some rows rejected (counts by reason "
                                "printed), or the lake cannot be read against the contract (a missing table "
                                "or required column, a misread file: one-line reason); 1 internal error.")
    _lake_args(val)
    val.add_argument("--start", help="limit to rows timed in [start, end)")
    val.add_argument("--end", help="end of that interval, excluded")
    val.add_argument("--out", help="also write OUT/validation_rejects.parquet (beside, never over, a run's "
                     "published rejects.parquet)")
    val.set_defaults(handler=_cmd_validate)

    try:
        from cardiosieve.pipeline import commands        # review, yield, export, show (stdlib-only at import)
    except ImportError:
        commands = None
    if commands is not None:
        commands.register(sub)
    from cardiosieve.pipeline import dbcommands          # db upgrade, db current (stdlib-only at import)
    dbcommands.register(sub)
    for command in sub.choices.values():       # also after the command: `cardiosieve run ... -v`
        _verbosity_args(command, argparse.SUPPRESS)
    return p


def _verbosity_args(p: argparse.ArgumentParser, default) -> None:
    loud = p.add_mutually_exclusive_group()
    loud.add_argument("-v", "--verbose", action="store_true", default=default,
                      help="also log each stage with its seconds (stderr)")
    loud.add_argument("-q", "--quiet", action="store_true", default=default,
                      help="log only warnings and errors, and print no run summary (it is in "
                           "OUT/run_summary.json)")


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever sys.stderr is at the time (a test's capture, a redirected stream)."""

    @property
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, _value):
        pass


PROGRESS_LOGGER = "cardiosieve.pipeline.run"
_LOG_HANDLER = _StderrHandler()
_LOG_HANDLER.setFormatter(logging.Formatter("%(asctime)s cardiosieve %(levelname)s %(message)s",
                                            datefmt="%Y-%m-%dT%H:%M:%S%z"))


@contextmanager
def cli_logging(verbose: bool = False, quiet: bool = False):
    """While a command runs, log records of cardiosieve's modules also go to stderr, one plain
    line each with its time (a terminal and a scheduler's log read the same). By default the
    run's progress (a line per chunk, with the time left) and warnings; with --verbose
    everything from DEBUG on (a line per stage, each table's row counts); with --quiet warnings
    only. An error stays the one line main() prints. What cardiosieve logs is counts,
    intervals, files and seconds: never a row value or a patient identifier. Undone afterwards,
    so a program that calls main() keeps its own logging as it was."""
    logger = logging.getLogger("cardiosieve")
    level = logger.level
    _LOG_HANDLER.setLevel(logging.DEBUG if verbose else logging.WARNING if quiet else logging.INFO)
    _LOG_HANDLER.filters.clear()
    if not verbose:                  # by default: the run's progress, and warnings from anywhere
        _LOG_HANDLER.addFilter(lambda r: r.levelno >= logging.WARNING or r.name == PROGRESS_LOGGER)
    logger.setLevel(min(_LOG_HANDLER.level, logger.getEffectiveLevel()))
    logger.addHandler(_LOG_HANDLER)
    try:
        yield
    finally:
        logger.removeHandler(_LOG_HANDLER)
        logger.setLevel(level)


def _lake_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("--lake", required=True, help="lake folder holding ecg/, ecg_lead/, lab/, patient/ "
                                                 "and optionally medication/")
    p.add_argument("--config", help="site configuration (TOML); see docs/configuration.md")


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "handler", None) is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    try:
        with cli_logging(verbose=getattr(args, "verbose", False), quiet=getattr(args, "quiet", False)):
            return args.handler(args) or EXIT_OK
    except BrokenPipeError:           # the reader (e.g. `| head`) closed the pipe: not an error
        import os
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except Exception as exc:          # classify; never print row values
        if isinstance(exc, BadInputError):
            print(f"cardiosieve: error: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        if isinstance(exc, OSError) and exc.errno is not None:   # the system, not the data: retry
            where = f" ({exc.filename})" if exc.filename else ""
            print(f"cardiosieve: I/O error: {exc.strerror}{where}; rerun the same interval "
                  f"when the storage is back (a rerun reproduces the same outputs)", file=sys.stderr)
            return EXIT_INTERNAL
        print(f"cardiosieve: internal error ({type(exc).__name__}); rerun with "
              f"CARDIOSIEVE_DEBUG=1 for the traceback", file=sys.stderr)
        import os
        if os.environ.get("CARDIOSIEVE_DEBUG"):
            raise
        return EXIT_INTERNAL


def _cmd_run(args) -> int:
    from cardiosieve.pipeline.landing import check_landed
    check_landed(args.lake, args.start, args.end, args.landing_marker)   # folder names only; exit 2 when missing
    from cardiosieve.pipeline.gateworker import GateWorker
    with GateWorker(args.config) as gate:      # first: Great Expectations imports while this process goes on
        from cardiosieve.pipeline.run import run_interval
        summary = run_interval(args.lake, args.out, args.start, args.end, config=args.config, db=args.db, gate=gate)
    if not getattr(args, "quiet", False):
        print(format_summary(summary))
    return EXIT_OK


def _cmd_backfill(args) -> int:
    if args.engine == "local":
        return _cmd_run(argparse.Namespace(**vars(args), landing_marker=""))
    try:
        import pyspark  # noqa: F401
    except ImportError:
        raise BadInputError("--engine spark needs pyspark: pip install 'cardiosieve[spark]'") from None
    from cardiosieve.pipeline.sparkengine import run_spark_interval
    summary = run_spark_interval(args.lake, args.out, args.start, args.end, config=args.config, db=args.db,
                                 master=args.master, buckets=args.buckets)
    if not getattr(args, "quiet", False):
        print(format_summary(summary))
    return EXIT_OK


def _cmd_validate(args) -> int:
    from cardiosieve.pipeline.validate import validate_lake
    result = validate_lake(args.lake, config=args.config, start=args.start, end=args.end, out=args.out)
    print(format_validation(result))
    rejected = sum(result["rejects_by_reason"].values())
    if rejected:                  # a scheduler or a script must see it without reading the report
        print(f"cardiosieve: validate: {rejected} row(s) rejected by the contract (reasons above)",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    return EXIT_OK


def format_summary(s: dict) -> str:
    """The run summary for a person and a scheduler log: counts only."""
    t = s["tables"]
    e = t["ecg"]
    screened = e.get("screened", e["accepted"])
    lines = [f"cardiosieve run [{s['interval'][0]}, {s['interval'][1]})",
             f"  ECGs in interval: {e['rows_in']}  screened: {screened}  rejected: {e['rows_in'] - screened} "
             f"(contract {e['rejected']}, quality {e['accepted'] - screened})"]
    lines.append("  rows read per table (in = accepted + rejected by the contract):")
    labels = {"ecg": "ecg (interval)", "ecg_lead": "ecg_lead (interval)", "ecg_history": "ecg (prior, window)",
              "lab": "lab (window)", "patient": "patient", "medication": "medication (window)"}
    for name, label in labels.items():
        if name in t:
            lines.append(f"    {label:<22} {t[name]['rows_in']:>8} = {t[name]['accepted']:>8} + {t[name]['rejected']}")
    if s.get("rejects_by_reason"):
        lines.append("  rejected rows by reason:")
        lines += [f"    {k:<38} {v}" for k, v in sorted(s["rejects_by_reason"].items())]
    else:
        lines.append("  rejected rows: none")
    if "quality" in s:
        q = s["quality"]
        lines.append(f"  quality checks: {q.get('failed', 0)} failed of {q.get('checks', 0)} "
                     f"({q.get('warnings', 0)} warnings); report {q.get('report', '')}")
    if "findings" in s:
        lines.append("  findings by screen and tier:")
        for screen, tiers in sorted(s["findings"].items()):
            tier_txt = "  ".join(f"tier {k}: {v}" for k, v in sorted(tiers.items()))
            lines.append(f"    {screen:<14} {tier_txt}")
    if "worklist" in s:
        w = s["worklist"]
        lines.append("  worklist items by screen: " +
                     ", ".join(f"{k} {v}" for k, v in sorted(w.get("by_screen", {}).items())))
        lines.append(f"  database: {w.get('db_counts', {})}")
    if s.get("engine"):
        e = s["engine"]
        lines.append(f"  engine: {e['name']} (master {e['master']}, {e['buckets']} patient buckets)")
    if s.get("seconds"):
        lines.append("  seconds: " + ", ".join(f"{k} {v:.2f}" for k, v in s["seconds"].items()))
    for name, path in s.get("outputs", {}).items():
        lines.append(f"  wrote {name}: {path}")
    lines.append("  " + CAUTION)
    return "\n".join(lines)


def format_validation(r: dict) -> str:
    lines = [f"cardiosieve validate {r['scope']}"]
    for name, t in r["tables"].items():
        lines.append(f"  {name:<11} rows {t['rows_in']:>9}  accepted {t['accepted']:>9}  rejected {t['rejected']:>6}")
    if r["rejects_by_reason"]:
        lines.append("  rejected rows by reason:")
        lines += [f"    {k:<38} {v}" for k, v in sorted(r["rejects_by_reason"].items())]
    if r.get("rejects_path"):
        lines.append(f"  wrote rejects: {r['rejects_path']}")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(main())
