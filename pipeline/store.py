"""The worklist in SQL (SQLAlchemy 2): items, findings history, review outcomes, missed cases,
yield and export.

Tables
    worklist_item       one row per item (pipeline.worklist.ITEM_COLUMNS), primary key item_id
    review              one row per recorded review outcome; the latest review of an item closes it;
                        with the item's rule version and tier when it was recorded
    finding_history     every finding of every run with the item it folded into, append-only,
                        one row per (run_id, screen, ecg_id, rule_version)
    missed_case         a case a screen should have flagged and did not, one per (ecg_id, screen)
    cardiosieve_schema  one row: the schema version (SCHEMA_VERSION), set by each migration
    cardiosieve_alembic_version  one row: the Alembic revision of the schema (VERSION_TABLE)

Schema changes are Alembic migrations in pipeline/migrations/versions, one revision per schema
version, the revision id the version in four digits:
    0001  the baseline: outcomes confirmed / not_confirmed (the first release; no version tables)
    0002  outcomes renamed finding_real / finding_not_real (staff read "confirmed" as a signed
          report); creates cardiosieve_schema
    0003  `rank` is the place in the review queue: explained and closed items lose theirs
          (NULL); indexes on status and run_id, so that ranking and the night's read-back
          follow the queue's length, not the store's history
    0004  finding_history (every run's findings with their item, appended in the upsert's
          transaction) and missed_case (review --missed), both empty; review gains
          rule_version_at_review and tier_at_review, existing reviews backfilled from their
          item's current values
The nightly run (open_store with create=True) and `cardiosieve db upgrade` (upgrade_store)
bring a store to HEAD_REVISION in one transaction under the store's lock (see _upgrade); a
store of a release before the migrations is recognised by its tables and stamped first. The
commands that only use a store (open_store with create=False) never change its schema: a store
behind is a StoreSchemaError naming `cardiosieve db upgrade`. A store already current costs one
look at VERSION_TABLE, and Alembic is not even imported.

SQLite by default (OUT/worklist.sqlite, see sqlite_url), PostgreSQL through a
`postgresql+psycopg://...` URL. Timestamps are stored in UTC (SQLite drops offsets, so UTC is
written and UTC is assumed on the way back). JSON travels as text. Nothing here logs or prints
row values; errors name tables, columns, files and counts.

The store names patients: a SQLite file open_store creates is owner-only (0600, whatever the
umask; SQLite gives its journal and WAL files the database file's permissions), and so is a CSV
export written to a file. Errors a person can fix are BadInputErrors (the CLI exits 2 with one
line): a URL of another database or a missing driver, a SQLite folder or (for the commands that
only use a store) file that does not exist (StoreUrlError), a SQLite store another process keeps
locked past the busy timeout (StoreLockedError), a schema this code cannot use (StoreSchemaError).

Sources
    WILSON-1927    Wilson EB. Probable inference, the law of succession, and statistical inference.
                   J Am Stat Assoc 1927;22:209-212 (the score interval).
    NEWCOMBE-1998  Newcombe RG. Two-sided confidence intervals for the single proportion: comparison
                   of seven methods. Stat Med 1998;17:857-872 (recommends the score interval; worked
                   examples used in tests/test_store.py).
"""
from __future__ import annotations

import datetime as dt
import os
import re
import sqlite3
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import (CheckConstraint, Column, DateTime, Float, ForeignKey, Index, Integer, MetaData,
                        String, Table, Text, TypeDecorator, UniqueConstraint, bindparam,
                        column, create_engine, event, func, insert, inspect, select, table, update)
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError, NoSuchModuleError

from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.files import PRIVATE_FILE_MODE, write_atomic
from cardiosieve.pipeline.worklist import (ACTIVE_STATUSES, ITEM_COLUMNS, STATUS_CLOSED, STATUS_REOPENED,
                               STATUSES, TIMESTAMP_COLUMNS, apply_reopen_rule, empty_items,
                               normalise_items, queue_order)

# Review outcomes: the one place they are named. The review column is String(16):
# "finding_not_real" is exactly 16 characters, so a longer name needs a wider column.
OUTCOME_FINDING_REAL = "finding_real"          # the flagged abnormality is real and was news
OUTCOME_FINDING_NOT_REAL = "finding_not_real"  # the reviewer does not find it
OUTCOME_ALREADY_KNOWN = "already_known"        # real, but the team already knew
OUTCOME_DATA_PROBLEM = "data_problem"          # flagged because of wrong or mismatched data
OUTCOMES = (OUTCOME_FINDING_REAL, OUTCOME_FINDING_NOT_REAL, OUTCOME_ALREADY_KNOWN, OUTCOME_DATA_PROBLEM)
# Names used before schema version 2 (staff read "confirmed" as a signed report). Still accepted
# as input (CLI and CSV) and rewritten by the migration; never stored, never shown in help.
LEGACY_OUTCOMES = {"confirmed": OUTCOME_FINDING_REAL, "not_confirmed": OUTCOME_FINDING_NOT_REAL}
# Positive predictive value counts a flag as a true positive when the abnormality was real,
# whether or not it was news: finding_real and already_known (local choice, docs/prioritisation.md).
TRUE_POSITIVE_OUTCOMES = (OUTCOME_FINDING_REAL, OUTCOME_ALREADY_KNOWN)
REVIEWED_REASON = "reviewed: {}"   # status_reason of an item closed by a review, with its outcome

# Reasons a review row from a CSV is rejected (reported per line, never silently dropped).
REJECT_MISSING_VALUE = "missing_value"
REJECT_UNKNOWN_OUTCOME = "unknown_outcome"
REJECT_UNKNOWN_ITEM = "unknown_item"
REJECT_UNPARSEABLE_TIMESTAMP = "unparseable_timestamp"
REJECT_NAIVE_TIMESTAMP = "naive_timestamp"
REJECT_BEFORE_FLAGGED = "reviewed_before_flagged"
REJECT_TEXT_TOO_LONG = "text_too_long"
REJECT_INVALID_TEXT = "invalid_text"
# Documented limits of a review's free text (docs/prioritisation.md): the role fits its column;
# a note is a short reason, not a clinical letter (local choice).
ROLE_MAX_CHARS = 128
NOTE_MAX_CHARS = 2000
REVIEW_CSV_REQUIRED = ("item_id", "reviewed_at", "reviewer_role", "outcome")
REVIEW_CSV_OPTIONAL = ("note",)

WILSON_CONFIDENCE = 0.95
# SQLite: how long a statement waits for another connection's lock (a nightly upsert) before
# giving up with StoreLockedError. Read at each open_store call, so tests can shorten it.
SQLITE_BUSY_TIMEOUT_S = 60.0
STORE_BACKENDS = ("sqlite", "postgresql")   # the dialects upsert_items has an insert for
STORE_URL_FORM = "sqlite:///PATH or postgresql+psycopg://USER@HOST/DATABASE"
CHUNK = 2000   # ids per IN (...) list; well under SQLite's bound-parameter limit
# Compared to decide whether an incoming item changed (run_id, rank, last_updated_at and
# first_flagged_at are bookkeeping: a rerun that changes only those leaves the row alone).
COMPARED_COLUMNS = [c for c in ITEM_COLUMNS if c not in ("item_id", "rank", "run_id", "last_updated_at",
                                                         "first_flagged_at")]


class UTCDateTime(TypeDecorator):
    """tz-aware timestamps in, tz-aware UTC out, on SQLite (which drops offsets) and PostgreSQL."""
    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is None or value is pd.NaT:
            return None
        if isinstance(value, pd.Timestamp):
            value = value.to_pydatetime()
        if value.tzinfo is None:
            raise ValueError("naive timestamp given to a UTC column")
        value = value.astimezone(dt.timezone.utc)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value, dialect):
        if value is None:
            return None
        return value.replace(tzinfo=dt.timezone.utc) if value.tzinfo is None else value.astimezone(dt.timezone.utc)


def _in_list(values) -> str:
    return ", ".join(f"'{v}'" for v in values)


metadata = MetaData()

worklist_item = Table(
    "worklist_item", metadata,
    Column("item_id", String(40), primary_key=True),
    Column("rank", Integer),
    Column("tier", Integer, nullable=False),
    Column("screen", String(64), nullable=False),
    Column("patient_id", Text, nullable=False),
    Column("ecg_id", Text, nullable=False),
    Column("ecg_at", UTCDateTime, nullable=False),
    Column("score", Float, nullable=False),
    Column("summary", Text),
    Column("evidence", Text),          # JSON
    Column("caveats", Text),           # JSON list
    Column("territories", Text),
    Column("rule_version", String(64)),
    Column("run_id", String(128)),
    Column("first_flagged_at", UTCDateTime, nullable=False),
    Column("status", String(16), nullable=False),
    Column("last_updated_at", UTCDateTime, nullable=False),
    Column("status_reason", Text),
    Column("episode_start", UTCDateTime, nullable=False),
    Column("episode_end", UTCDateTime, nullable=False),
    Column("other_ecg_ids", Text),     # JSON list
    Column("score_parts", Text),       # JSON object
    CheckConstraint(f"status IN ({_in_list(STATUSES)})", name="ck_worklist_item_status"),
    CheckConstraint("tier BETWEEN 1 AND 4", name="ck_worklist_item_tier"),
    Index("ix_worklist_item_patient_screen", "patient_id", "screen"),
    Index("ix_worklist_item_rank", "rank"),
    Index("ix_worklist_item_status", "status"),     # the queue: _rerank, read_worklist (schema 3)
    Index("ix_worklist_item_run_id", "run_id"),     # what a run changed: read_worklist (schema 3)
)

review = Table(
    "review", metadata,
    Column("review_id", Integer, primary_key=True, autoincrement=True),
    Column("item_id", String(40), ForeignKey("worklist_item.item_id"), nullable=False),
    Column("reviewed_at", UTCDateTime, nullable=False),
    Column("reviewer_role", String(128), nullable=False),
    Column("outcome", String(16), nullable=False),
    Column("note", Text),
    Column("recorded_via", String(16), nullable=False),   # "cli", "csv" or "web"
    CheckConstraint(f"outcome IN ({_in_list(OUTCOMES)})", name="ck_review_outcome"),
    UniqueConstraint("item_id", "reviewed_at", "reviewer_role", name="uq_review_entry"),
    Index("ix_review_item", "item_id"),
    # The item's rule version and tier when the review was recorded (schema 4): a later rerun
    # may change the item, and yield by rule version must count what the reviewer saw.
    Column("rule_version_at_review", String(64)),
    Column("tier_at_review", Integer),
)

# Every finding of every run, as the run made it, with the item it folded into (schema 4).
# Append-only: rows are inserted in the transaction of the night's upsert (upsert_items with
# `findings`) and never updated or deleted. One row per (run_id, screen, ecg_id, rule_version):
# a rerun of the same window under the same rules adds nothing, under changed rules (another
# version string, a site override included) it adds its findings.
finding_history = Table(
    "finding_history", metadata,
    Column("history_id", Integer, primary_key=True, autoincrement=True),
    Column("run_id", String(128), nullable=False),
    Column("run_end_at", UTCDateTime, nullable=False),
    Column("item_id", String(40), ForeignKey("worklist_item.item_id"), nullable=False),
    Column("screen", String(64), nullable=False),
    Column("ecg_id", Text, nullable=False),
    Column("patient_id", Text, nullable=False),
    Column("acquired_at", UTCDateTime, nullable=False),
    Column("tier", Integer, nullable=False),
    Column("rule_version", String(64), nullable=False),
    Column("summary", Text),
    Column("evidence", Text),          # JSON
    Column("caveats", Text),           # JSON list
    Column("territories", Text),
    Column("score_parts", Text),       # JSON object, with the care location the score used
    CheckConstraint("tier BETWEEN 1 AND 4", name="ck_finding_history_tier"),
    UniqueConstraint("run_id", "screen", "ecg_id", "rule_version", name="uq_finding_history_entry"),
    Index("ix_finding_history_item", "item_id"),
    Index("ix_finding_history_ecg", "ecg_id"),
)
HISTORY_COLUMNS = [c.name for c in finding_history.columns if c.name != "history_id"]

# A case a screen should have flagged and did not, recorded by a reviewer (schema 4), for
# sensitivity estimates later; one per ECG and screen. Counted only in the yield table yet.
missed_case = Table(
    "missed_case", metadata,
    Column("missed_id", Integer, primary_key=True, autoincrement=True),
    Column("patient_id", Text, nullable=False),
    Column("ecg_id", Text, nullable=False),
    Column("screen", String(64), nullable=False),
    Column("recorded_at", UTCDateTime, nullable=False),
    Column("reviewer_role", String(128), nullable=False),
    Column("note", Text),
    UniqueConstraint("ecg_id", "screen", name="uq_missed_case_entry"),
    Index("ix_missed_case_screen", "screen"),
)

# The schema's version. Each is one Alembic revision in pipeline/migrations/versions, its id the
# version in four digits; a new one bumps this number (DEVELOPERS.md, "Changing the store's schema").
SCHEMA_VERSION = 4
HEAD_REVISION = f"{SCHEMA_VERSION:04d}"
MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"
# Alembic's revision table. Not its default alembic_version: another application using Alembic
# (Airflow does) may keep its own in the same database.
VERSION_TABLE = "cardiosieve_alembic_version"
# Read by the release before the migrations (it refuses a version it does not know); every
# revision from 0002 on sets it to its own number.
cardiosieve_schema = Table(
    "cardiosieve_schema", metadata,
    Column("id", Integer, primary_key=True, autoincrement=False),
    Column("version", Integer, nullable=False),
    CheckConstraint("id = 1", name="ck_cardiosieve_schema_one_row"),
)


class StoreSchemaError(BadInputError):
    """The store's schema cannot be used or upgraded by this code (the message names tables
    and versions, never row values)."""


class StoreUrlError(BadInputError):
    """The store URL cannot be used: not a URL, another kind of database, a driver that is not
    installed, a SQLite folder or file that does not exist. The message names the scheme, the
    driver or the file, never the rest of the URL (it may hold a password)."""


class StoreLockedError(BadInputError):
    """Another process kept the SQLite store locked for longer than the busy timeout. Unlike most
    bad input, the same command can succeed later, once that process has finished: the CLI says
    so in its one line (exit 2)."""


# ---------------------------------------------------------------------------------------------
# Engine and reading
# ---------------------------------------------------------------------------------------------
def sqlite_url(out) -> str:
    """The default store: OUT/worklist.sqlite."""
    return f"sqlite:///{(Path(out) / 'worklist.sqlite').resolve()}"


def _sqlite_file(url: URL) -> Path | None:
    """The file of a SQLite URL; None for an in-memory database or a URI filename (?uri=true,
    which SQLite itself interprets)."""
    if url.get_backend_name() != "sqlite" or url.database in (None, "", ":memory:"):
        return None
    if str(url.query.get("uri", "")).lower() in ("1", "true", "yes", "on"):
        return None
    return Path(url.database)


def check_store_url(url, *, must_exist: bool = False) -> None:
    """Raise StoreUrlError unless open_store can use `url`: a SQLAlchemy URL of SQLite or
    PostgreSQL whose driver is installed and synchronous; for a SQLite file, its folder must
    exist (a typo in --db must not make a store somewhere new), and with `must_exist` the file
    too (a command that only uses a store must not create an empty one). Connects to nothing:
    run it before anything else is done. Messages name the scheme, the driver or the file."""
    text = str(url)
    scheme = text.split(":", 1)[0] if ":" in text else ""
    try:
        parsed = make_url(text)
        backend = parsed.get_backend_name()
    except (ArgumentError, NoSuchModuleError, ValueError):
        given = f"scheme {scheme!r}" if scheme else "no scheme"
        raise StoreUrlError(f"database URL: cannot read it ({given}); expected {STORE_URL_FORM}") from None
    if backend not in STORE_BACKENDS:
        raise StoreUrlError(f"database URL: unsupported scheme {parsed.drivername!r} "
                            f"(cardiosieve stores its worklist in {' or '.join(STORE_BACKENDS)}); "
                            f"expected {STORE_URL_FORM}")
    try:
        dialect = parsed.get_dialect()
        dialect.import_dbapi()
    except NoSuchModuleError:
        raise StoreUrlError(f"database URL: unknown driver in scheme {parsed.drivername!r}; "
                            f"expected {STORE_URL_FORM}") from None
    except ImportError:
        raise StoreUrlError(f"database URL: the driver of scheme {parsed.drivername!r} is not "
                            f"installed; expected {STORE_URL_FORM}") from None
    if getattr(dialect, "is_async", False):
        raise StoreUrlError(f"database URL: scheme {parsed.drivername!r} is an asynchronous driver; "
                            f"expected {STORE_URL_FORM}")
    path = _sqlite_file(parsed)
    if path is None:
        return
    folder = path.parent
    if not folder.is_dir():
        raise StoreUrlError(f"the folder {folder} of the worklist database does not exist "
                            f"(create it, or check the path)")
    if must_exist and not path.exists():
        raise StoreUrlError(f"no worklist database at {path}")


def _create_private_file(path: Path) -> None:
    """An empty file, owner-only whatever the umask (an empty file is an empty SQLite database:
    SQLite keeps the mode it finds, and gives its journal and WAL files the same)."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, PRIVATE_FILE_MODE)
    except FileExistsError:   # another process made it meanwhile: it is theirs, as it was made
        return
    try:
        os.fchmod(fd, PRIVATE_FILE_MODE)
    finally:
        os.close(fd)


def _translate_errors(busy_timeout_s: float):
    """An engine's handle_error hook: driver errors a person can act on become one-line
    BadInputErrors instead of a traceback (the CLI exits 2)."""
    def hook(context) -> None:
        exc = context.original_exception
        code = getattr(exc, "sqlite_errorcode", None)
        if isinstance(exc, sqlite3.OperationalError) and (
                (code is not None and code & 0xFF == sqlite3.SQLITE_BUSY) or "database is locked" in str(exc)):
            raise StoreLockedError(f"the database is locked by another process (waited {busy_timeout_s:g} s); "
                                   f"try again when it has finished") from exc
        if isinstance(exc, sqlite3.DatabaseError) and code is not None and code & 0xFF == sqlite3.SQLITE_NOTADB:
            name = context.engine.url.database if context.engine is not None else "the file given"
            raise StoreUrlError(f"{name} is not a SQLite database") from exc
    return hook


def _engine(url: str, create: bool, busy_timeout_s: float | None) -> Engine:
    """An engine for `url` (checked first, see check_store_url); with `create`, a SQLite file
    that does not exist is made, empty and owner-only."""
    check_store_url(url, must_exist=not create)
    parsed = make_url(url)
    path = _sqlite_file(parsed)
    if create and path is not None and not path.exists():
        _create_private_file(path)
    busy = SQLITE_BUSY_TIMEOUT_S if busy_timeout_s is None else float(busy_timeout_s)
    if parsed.get_backend_name() == "sqlite":
        # A writer waits for another's write lock (a nightly upsert) rather than failing at once.
        engine = create_engine(parsed, connect_args={"timeout": busy})
    else:
        engine = create_engine(parsed)
    event.listen(engine, "handle_error", _translate_errors(busy))
    return engine


def open_store(url: str, create: bool = True, busy_timeout_s: float | None = None) -> Engine:
    """Engine for `url` (checked first, see check_store_url), the store's schema at
    HEAD_REVISION. A store already there is only read: one look at VERSION_TABLE.

    create: the nightly run's open: make the store if there is none (a new SQLite file is
    owner-only) and bring an older store to HEAD_REVISION (see _upgrade). False for the commands
    that only use a store, which never change its schema: no file, or a database without the
    store's tables, is a StoreUrlError, and a store behind this code a StoreSchemaError telling
    the user to run `cardiosieve db upgrade` (a store of the release before the migrations, at
    the current schema but not stamped yet, is used as it is). busy_timeout_s: SQLite's wait
    for another connection's lock (default SQLITE_BUSY_TIMEOUT_S), after which a statement
    raises StoreLockedError."""
    engine = _engine(url, create, busy_timeout_s)
    try:
        with engine.connect() as conn:
            found, stamped = _found_revision(conn)
        if found is None and not create:
            raise StoreUrlError(f"no worklist store in {_where(engine)} (it has none of cardiosieve's tables)")
        if found != HEAD_REVISION or (create and not stamped):
            check_known_revision(found)
            if not create:
                raise StoreSchemaError(
                    f"the worklist store in {_where(engine)} has schema revision {found} and this cardiosieve "
                    f"needs {HEAD_REVISION}: back it up, then run `cardiosieve db upgrade {_store_option(engine)}`")
            with _schema_transaction(engine) as conn:
                _upgrade(conn)
    except BaseException:
        engine.dispose()   # the caller never gets the engine: close its connections here
        raise
    return engine


def upgrade_store(url: str, create: bool = False, busy_timeout_s: float | None = None) -> tuple[str | None, str]:
    """`cardiosieve db upgrade`: bring the store at `url` to HEAD_REVISION (see _upgrade) and
    return (revision before, revision after); None before means a new store. Without `create`
    a store that does not exist is a StoreUrlError, as for the commands that only use a store
    (a typo in the path must not make a store somewhere new)."""
    engine = _engine(url, create, busy_timeout_s)
    try:
        with engine.connect() as conn:
            found, _ = _found_revision(conn)
        if found is None and not create:
            raise StoreUrlError(f"no worklist store in {_where(engine)} (it has none of cardiosieve's tables; "
                                f"give --create to make one)")
        with _schema_transaction(engine) as conn:
            before = _upgrade(conn)
    finally:
        engine.dispose()
    return before, HEAD_REVISION


def store_revision(url: str, busy_timeout_s: float | None = None) -> tuple[str, bool]:
    """`cardiosieve db current`: the store's schema revision and whether it is recorded in
    VERSION_TABLE (False: recognised from the tables of an older release); changes nothing.
    A store that does not exist is a StoreUrlError."""
    engine = _engine(url, False, busy_timeout_s)
    try:
        with engine.connect() as conn:
            found, stamped = _found_revision(conn)
    finally:
        engine.dispose()
    if found is None:
        raise StoreUrlError(f"no worklist store in {_where(engine)} (it has none of cardiosieve's tables)")
    return found, stamped


def _where(engine: Engine) -> str:
    """The store named for a message: its SQLite file, never a server URL (it may hold a password)."""
    path = _sqlite_file(engine.url)
    return str(path) if path is not None else "the database given"


def _store_option(engine: Engine) -> str:
    """How to name this store on the command line, for a message."""
    path = _sqlite_file(engine.url)
    if path is None:
        return "--db URL"
    return f"--out {path.parent}" if path.name == "worklist.sqlite" else f"--db sqlite:///{path}"


# ---------------------------------------------------------------------------------------------
# Schema revisions and migrations (Alembic, pipeline/migrations)
# ---------------------------------------------------------------------------------------------
# Key of the PostgreSQL advisory lock held while the schema is checked and upgraded, so that two
# processes opening an old store at once migrate it once (any fixed 64-bit number: "cardsiev").
_PG_SCHEMA_LOCK = 0x63617264_73696576
# Key of the advisory lock every worklist write holds on PostgreSQL ("cardwrit"): one writer at a
# time, as SQLite's BEGIN IMMEDIATE gives. Row locks alone are not enough: the upsert and a review
# each re-rank the whole table, so each would hold rows the other waits for (a deadlock).
_PG_WRITE_LOCK = 0x63617264_77726974
_version_table = table(VERSION_TABLE, column("version_num"))


def _found_revision(conn: Connection) -> tuple[str | None, bool]:
    """(revision, stamped): the revision in VERSION_TABLE (stamped True); else the one the
    tables of an older release show (stamped False): cardiosieve_schema's version as its
    revision, "0001" for a store made before versioning (our tables, no version table);
    (None, False) for a database without the store's tables."""
    have = inspect(conn)
    if have.has_table(VERSION_TABLE):
        found = conn.execute(select(_version_table.c.version_num)).scalars().all()
        if len(found) > 1:
            raise StoreSchemaError(f"{VERSION_TABLE} holds {len(found)} revisions; cardiosieve's history has "
                                   f"one line: restore the store from its backup")
        if found:
            return str(found[0]), True
    if have.has_table(cardiosieve_schema.name):
        version = conn.execute(select(cardiosieve_schema.c.version)).scalar()
        if version is not None:
            return _revision_of(int(version)), False
    if have.has_table(review.name) and have.has_table(worklist_item.name):
        return _revision_of(1), False
    if have.has_table(review.name) or have.has_table(worklist_item.name):
        raise StoreSchemaError("the database has one of the store's tables (worklist_item, review) but not "
                               "the other: not a store cardiosieve can use or upgrade")
    return None, False


def _revision_of(version: int) -> str:
    """Revision ids are schema versions written with four digits: version 2 is "0002"."""
    return f"{version:04d}"


def check_known_revision(found: str | None) -> None:
    """StoreSchemaError for a revision this code does not know (a later release's)."""
    if found is not None and (not found.isdigit() or int(found) > SCHEMA_VERSION):
        raise StoreSchemaError(f"store schema revision {found} is newer than this cardiosieve "
                               f"(revision {HEAD_REVISION}): upgrade cardiosieve")


@contextmanager
def _write_transaction(engine: Engine, pg_lock: int | None = _PG_WRITE_LOCK):
    """One write transaction that holds the store's write lock from its first read, so that a
    read-modify-write (the nightly upsert, a review) can never overwrite a concurrent one.

    SQLite: the sqlite3 module begins a transaction only before INSERT/UPDATE/DELETE (and CREATE,
    DROP and ALTER would each commit on their own), so the connection is put in driver autocommit
    and BEGIN IMMEDIATE takes the write lock at once; a second writer waits (busy timeout).
    PostgreSQL: an ordinary transaction that first takes the advisory lock `pg_lock` (released
    at commit; by default the worklist's write lock), and readers that modify lock their rows
    (FOR UPDATE in `_read`) as well."""
    if engine.dialect.name == "sqlite":
        with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
            conn.exec_driver_sql("BEGIN IMMEDIATE")
            try:
                yield conn
            except BaseException:
                if conn.connection.dbapi_connection.in_transaction:
                    conn.exec_driver_sql("ROLLBACK")
                raise
            conn.exec_driver_sql("COMMIT")
    else:
        with engine.begin() as conn:
            if engine.dialect.name == "postgresql" and pg_lock is not None:
                conn.execute(select(func.pg_advisory_xact_lock(pg_lock)))
            yield conn


def _schema_transaction(engine: Engine):
    """One transaction for a schema change, DDL included, holding the store's write lock from
    before the revision is read (a second process waits, then finds the store current)."""
    return _write_transaction(engine, pg_lock=_PG_SCHEMA_LOCK)


def _upgrade(conn: Connection) -> str | None:
    """Bring the store to HEAD_REVISION inside the caller's schema transaction and return the
    revision it had (None: an empty database). Re-reads the revision under the lock, so a store
    another process has just upgraded is left alone. A store of an older release, without
    VERSION_TABLE, is first stamped at the revision its tables show (nothing else changes), then
    upgraded; an empty database runs every migration from 0001. Alembic is imported only here:
    a store already current never pays for it. Alembic's `op` and `context` are module-level
    proxies, so one process may run one migration at a time: the store's lock, taken before
    this, gives that for threads too."""
    found, stamped = _found_revision(conn)
    if found == HEAD_REVISION and stamped:
        return found
    check_known_revision(found)
    from alembic import command
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["connection"] = conn      # env.py runs on it, inside this transaction
    if found is not None and not stamped:
        command.stamp(config, found)
    command.upgrade(config, "head")
    if _found_revision(conn) != (HEAD_REVISION, True):
        raise StoreSchemaError(f"the migrations did not bring the store to revision {HEAD_REVISION}: rolled back")
    return found


def _records(df: pd.DataFrame) -> list[dict]:
    """Rows as dicts with None for every missing value (PostgreSQL would store NaN as 'NaN')."""
    return df.astype(object).where(df.notna(), None).to_dict("records")


def _frame(rows, columns) -> pd.DataFrame:
    return pd.DataFrame([tuple(r) for r in rows], columns=columns)


def _items(rows) -> pd.DataFrame:
    """Item rows read from worklist_item (ITEM_COLUMNS) as a typed frame in queue order."""
    if not rows:
        return empty_items()
    return queue_order(normalise_items(_frame(rows, ITEM_COLUMNS)))


def _read(conn: Connection, item_ids=None, patient_ids=None, screens=None, for_update: bool = False) -> pd.DataFrame:
    t = worklist_item
    cols = [t.c[c] for c in ITEM_COLUMNS]
    base = select(*cols)
    if for_update:                 # PostgreSQL row locks; SQLite holds the whole store already
        base = base.with_for_update()
    if screens is not None:
        base = base.where(t.c.screen.in_(list(screens)))
    filters = [(t.c.item_id, item_ids), (t.c.patient_id, patient_ids)]
    column, values = next(((c, v) for c, v in filters if v is not None), (None, None))
    if column is None:
        rows = conn.execute(base).all()
    else:
        values = sorted(set(map(str, values)))
        rows = [r for i in range(0, len(values), CHUNK)
                for r in conn.execute(base.where(column.in_(values[i:i + CHUNK]))).all()]
        if item_ids is not None and patient_ids is not None:
            wanted = set(map(str, patient_ids))
            rows = [r for r in rows if r.patient_id in wanted]
    return _items(rows)


def read_items(engine: Engine, patient_ids=None, screens=None, item_ids=None) -> pd.DataFrame:
    """Stored items (ITEM_COLUMNS), in rank order; optionally only these items, patients and screens."""
    with engine.connect() as conn:
        return _read(conn, item_ids=item_ids, patient_ids=patient_ids, screens=screens)


def read_worklist(engine: Engine, run_ids) -> pd.DataFrame:
    """The night's worklist (OUT/worklist.parquet), in queue order with the store's rank:
    the active items (open, reopened) and the items the runs `run_ids` inserted or changed
    (upsert_items keeps the stored run_id of an item a run left unchanged, so an item closed by
    a review and not touched since keeps an earlier run's id and is left out). One WHERE in SQL:
    the closed and explained history is never read. The whole table stays in the store
    (read_items, export_items, `show --include-closed`)."""
    t = worklist_item
    run_ids = sorted(set(map(str, run_ids)))
    q = (select(*[t.c[c] for c in ITEM_COLUMNS])
         .where(t.c.status.in_(ACTIVE_STATUSES) | t.c.run_id.in_(run_ids)))
    with engine.connect() as conn:
        rows = conn.execute(q).all()
    return _items(rows)


REVIEW_COLUMNS = ["item_id", "reviewed_at", "reviewer_role", "outcome", "note", "recorded_via",
                  "rule_version_at_review", "tier_at_review"]


def read_reviews(engine: Engine, item_ids) -> pd.DataFrame:
    """The recorded reviews of these items (REVIEW_COLUMNS), oldest first; reviewed_at in UTC."""
    ids = sorted(set(map(str, item_ids)))
    q = select(*[review.c[c] for c in REVIEW_COLUMNS])
    with engine.connect() as conn:
        rows = [r for i in range(0, len(ids), CHUNK)
                for r in conn.execute(q.where(review.c.item_id.in_(ids[i:i + CHUNK]))
                                      .order_by(review.c.reviewed_at, review.c.review_id)).all()]
    df = _frame(rows, REVIEW_COLUMNS)
    df["reviewed_at"] = pd.to_datetime(df["reviewed_at"], utc=True)
    return df


def read_items_between(engine: Engine, since, until, column: str = "first_flagged_at") -> pd.DataFrame:
    """Stored items (ITEM_COLUMNS) whose `column` (first_flagged_at or ecg_at) is in [since,
    until): one WHERE in SQL, so an audit of a month does not read the store's whole history."""
    if column not in ("first_flagged_at", "ecg_at"):
        raise ValueError(f"read_items_between: not a time column of an item: {column!r}")
    t = worklist_item
    q = (select(*[t.c[c] for c in ITEM_COLUMNS])
         .where(t.c[column] >= _utc_bound(since), t.c[column] < _utc_bound(until)))
    with engine.connect() as conn:
        return _items(conn.execute(q).all())


FINDING_HISTORY_READ = ["history_id", "run_id", "run_end_at", "item_id", "screen", "ecg_id", "patient_id",
                        "acquired_at", "tier", "rule_version"]


FINDING_HISTORY_TEXTS = ["summary", "evidence", "caveats", "territories", "score_parts"]


def read_finding_history(engine: Engine, since=None, until=None, with_texts: bool = False) -> pd.DataFrame:
    """finding_history rows (FINDING_HISTORY_READ, and FINDING_HISTORY_TEXTS when `with_texts`:
    the audit's follow-up rules read the evidence) of ECGs acquired in [since, until) (either
    bound may be None), in the order they were appended; times in UTC."""
    h = finding_history
    columns = FINDING_HISTORY_READ + (FINDING_HISTORY_TEXTS if with_texts else [])
    q = select(*[h.c[c] for c in columns])
    if since is not None:
        q = q.where(h.c.acquired_at >= _utc_bound(since))
    if until is not None:
        q = q.where(h.c.acquired_at < _utc_bound(until))
    with engine.connect() as conn:
        df = _frame(conn.execute(q.order_by(h.c.history_id)).all(), columns)
    for c in ("run_end_at", "acquired_at"):
        df[c] = pd.to_datetime(df[c], utc=True)
    df["tier"] = df["tier"].astype("int64")
    return df


MISSED_CASE_READ = ["missed_id", "patient_id", "ecg_id", "screen", "recorded_at"]


def read_missed_cases(engine: Engine) -> pd.DataFrame:
    """Every recorded missed case (MISSED_CASE_READ: role and note left out)."""
    m = missed_case
    with engine.connect() as conn:
        df = _frame(conn.execute(select(*[m.c[c] for c in MISSED_CASE_READ]).order_by(m.c.missed_id)).all(),
                    MISSED_CASE_READ)
    df["recorded_at"] = pd.to_datetime(df["recorded_at"], utc=True)
    return df


# ---------------------------------------------------------------------------------------------
# Upsert and rank
# ---------------------------------------------------------------------------------------------
def _canonical(df: pd.DataFrame) -> pd.DataFrame:
    """COMPARED_COLUMNS as text, so equal content compares equal across dialects."""
    out = pd.DataFrame(index=df.index)
    for c in COMPARED_COLUMNS:
        s = df[c]
        if c in TIMESTAMP_COLUMNS:
            s = s.dt.strftime("%Y-%m-%dT%H:%M:%S.%f")
        elif c == "score":
            s = s.round(6).map("{:.6f}".format)
        out[c] = s.astype("str").fillna("\x00")
    return out


def _rerank(conn: Connection) -> None:
    """The review queue's ranks, the same as worklist.rank_items: 1 to n over the active items
    (open, reopened) in queue order, NULL for the explained and closed items, which have left
    the queue. The pipeline's only rank (build_items leaves it NA): a review moves every active
    item below the one it closes, and a night's new items move the stored ones below them.
    Both statements read the active items only (ix_worklist_item_status) and write only ranks
    that change, so the cost follows the queue's length, not the store's history."""
    t = worklist_item
    active = t.c.status.in_(ACTIVE_STATUSES)
    conn.execute(update(t).where(~active, t.c.rank.is_not(None)).values(rank=None))
    rn = func.row_number().over(order_by=[t.c.tier, t.c.score.desc(), t.c.ecg_at.desc(), t.c.item_id])
    ordered = select(t.c.item_id.label("ordered_id"), rn.label("rn")).where(active).subquery("ordered")
    conn.execute(update(t).where(t.c.item_id == ordered.c.ordered_id, t.c.rank.is_distinct_from(ordered.c.rn))
                 .values(rank=ordered.c.rn))


def upsert_items(engine: Engine, items: pd.DataFrame, history: pd.DataFrame | None = None) -> dict:
    """Insert or update items on item_id, in one transaction, then re-rank the whole table.

    Rows whose content (COMPARED_COLUMNS) equals the stored row are left alone, so running the
    same window twice gives the identical table. A stored closed or explained item is not
    reopened unless the incoming one is more severe (worklist.apply_reopen_rule); then it reopens
    with the reason, and a closed item that stays closed keeps the finding that was reviewed
    (its rule_version included). first_flagged_at is never overwritten.

    history: the run's findings as finding_history rows (worklist.history_rows), appended in the
    same transaction, after the items they point to, so that a crash leaves both or neither. A
    row already there (same run_id, screen, ecg_id, rule_version) is skipped, never rewritten.
    Returns counts: inserted, updated, reopened, unchanged (items) and, with history, history
    (finding_history rows added)."""
    counts = {"inserted": 0, "updated": 0, "reopened": 0, "unchanged": 0}
    if history is not None:
        counts["history"] = 0
    if items.empty:
        if history is not None and len(history):
            raise ValueError("finding_history: rows given without the items they fold into")
        return counts
    incoming = normalise_items(items)
    if incoming["item_id"].duplicated().any():
        raise ValueError("worklist items: item_id is not unique within the batch")
    t = worklist_item
    with _write_transaction(engine) as conn:
        stored = _read(conn, item_ids=incoming["item_id"], for_update=True)   # a review waits, or was seen
        incoming = apply_reopen_rule(incoming, stored)
        known = incoming["item_id"].isin(stored["item_id"])
        old = stored.set_index("item_id").reindex(incoming["item_id"])
        old.index = incoming.index
        same = (_canonical(incoming) == _canonical(old)).all(axis=1) & known
        reopened = known & incoming["status"].eq(STATUS_REOPENED) & old["status"].ne(STATUS_REOPENED)
        counts["inserted"] = int((~known).sum())
        counts["unchanged"] = int(same.sum())
        counts["reopened"] = int(reopened.sum())
        counts["updated"] = int((known & ~same & ~reopened).sum())
        write = incoming[~same]
        if len(write):
            make = {"postgresql": postgresql.insert, "sqlite": sqlite.insert}[engine.dialect.name]
            stmt = make(t)
            stmt = stmt.on_conflict_do_update(
                index_elements=[t.c.item_id],
                set_={c.name: stmt.excluded[c.name] for c in t.columns
                      if c.name not in ("item_id", "first_flagged_at")})
            rows = _records(write[ITEM_COLUMNS])
            for i in range(0, len(rows), CHUNK):
                conn.execute(stmt, rows[i:i + CHUNK])
            _rerank(conn)
        if history is not None and len(history):
            counts["history"] = _append_history(conn, engine.dialect.name, history)
    return counts


def _append_history(conn: Connection, dialect: str, history: pd.DataFrame) -> int:
    """Insert finding_history rows, skipping those already stored (uq_finding_history_entry);
    returns the rows added. The message of a bad batch names columns and counts only."""
    h = finding_history
    missing = [c for c in HISTORY_COLUMNS if c not in history.columns]
    if missing:
        raise ValueError(f"finding_history: rows lack columns: {', '.join(missing)}")
    unnamed = int(history["rule_version"].isna().sum())
    if unnamed:
        raise ValueError(f"finding_history: {unnamed} row(s) without rule_version")
    run_ids = sorted(set(history["run_id"].astype(str)))

    def stored() -> int:
        return conn.execute(select(func.count()).select_from(h).where(h.c.run_id.in_(run_ids))).scalar()

    before = stored()
    make = {"postgresql": postgresql.insert, "sqlite": sqlite.insert}[dialect]
    stmt = make(h).on_conflict_do_nothing(index_elements=[h.c.run_id, h.c.screen, h.c.ecg_id, h.c.rule_version])
    rows = _records(history[HISTORY_COLUMNS])
    for i in range(0, len(rows), CHUNK):
        conn.execute(stmt, rows[i:i + CHUNK])
    return stored() - before


# ---------------------------------------------------------------------------------------------
# Reviews
# ---------------------------------------------------------------------------------------------
def normalise_outcome(text) -> str:
    """'Finding not real', 'finding-not-real' and 'FINDING_NOT_REAL' all mean finding_not_real;
    the old words ('Not confirmed', 'confirmed', ...) map to their new names (LEGACY_OUTCOMES)."""
    word = re.sub(r"[\s\-]+", "_", str(text).strip().lower())
    return LEGACY_OUTCOMES.get(word, word)


def _apply_reviews(conn: Connection, new: pd.DataFrame, recorded_via: str) -> int:
    """Insert review rows and close their items: an item is closed by its latest review, unless
    it was reopened after that review was made. Returns rows inserted."""
    t, r = worklist_item, review
    ids = sorted(new["item_id"].unique())
    items = _frame(conn.execute(select(t.c.item_id, t.c.status, t.c.last_updated_at, t.c.rule_version, t.c.tier)
                                .where(t.c.item_id.in_(ids)).with_for_update()).all(),
                   ["item_id", "status", "last_updated_at", "rule_version", "tier"])
    # What the reviewer saw: the item's rule version and tier as stored when the review is recorded.
    seen = items.set_index("item_id")
    rows = _records(new[["item_id", "reviewed_at", "reviewer_role", "outcome", "note"]].assign(
        recorded_via=recorded_via, rule_version_at_review=new["item_id"].map(seen["rule_version"]),
        tier_at_review=new["item_id"].map(seen["tier"])))
    conn.execute(insert(r), rows)
    latest = _frame(conn.execute(
        select(r.c.item_id, r.c.reviewed_at, r.c.outcome, r.c.review_id).where(r.c.item_id.in_(ids))).all(),
        ["item_id", "reviewed_at", "outcome", "review_id"])
    latest = latest.sort_values(["item_id", "reviewed_at", "review_id"]).drop_duplicates("item_id", keep="last")
    items = items[["item_id", "status", "last_updated_at"]]
    m = latest.merge(items, on="item_id")
    close = ~(m["status"].eq(STATUS_REOPENED) & (m["reviewed_at"] < m["last_updated_at"]))
    m = m[close]
    if len(m):
        conn.execute(update(t).where(t.c.item_id == bindparam("b_item_id")).values(
            status=STATUS_CLOSED, status_reason=bindparam("b_reason"), last_updated_at=bindparam("b_at")),
            [{"b_item_id": i, "b_reason": REVIEWED_REASON.format(o), "b_at": a}
             for i, o, a in zip(m["item_id"], m["outcome"], m["reviewed_at"])])
        _rerank(conn)
    return len(rows)


def _check_reviews(conn: Connection, df: pd.DataFrame) -> pd.Series:
    """Reject reason per review row (NaN = fine). df has item_id, reviewed_at (UTC or NaT),
    reviewer_role, outcome already normalised."""
    t = worklist_item
    ids = sorted(set(df["item_id"].dropna().astype(str)))
    found = [row for i in range(0, len(ids), CHUNK) for row in conn.execute(
        select(t.c.item_id, t.c.first_flagged_at).where(t.c.item_id.in_(ids[i:i + CHUNK]))).all()]
    flagged = _frame(found, ["item_id", "first_flagged_at"])
    flagged["first_flagged_at"] = pd.to_datetime(flagged["first_flagged_at"], utc=True)
    first = df[["item_id"]].merge(flagged, on="item_id", how="left")["first_flagged_at"]
    first.index = df.index
    reason = pd.Series(np.nan, index=df.index, dtype="str")
    reason = reason.mask(reason.isna() & df["reviewed_at"].notna() & first.notna() & (df["reviewed_at"] < first),
                         REJECT_BEFORE_FLAGGED)
    reason = reason.mask(~df["item_id"].isin(flagged["item_id"]), REJECT_UNKNOWN_ITEM)
    reason = reason.mask(~df["outcome"].isin(OUTCOMES), REJECT_UNKNOWN_OUTCOME)
    role = df["reviewer_role"].astype("str").fillna("")
    note = df["note"].astype("str").fillna("") if "note" in df else pd.Series("", index=df.index, dtype="str")
    too_long = (role.str.len() > ROLE_MAX_CHARS) | (note.str.len() > NOTE_MAX_CHARS)
    nul = role.str.contains("\x00", regex=False) | note.str.contains("\x00", regex=False)
    reason = reason.mask(too_long.to_numpy(), REJECT_TEXT_TOO_LONG).mask(nul.to_numpy(), REJECT_INVALID_TEXT)
    return reason


def record_review(engine: Engine, item_id: str, outcome: str, role: str, note: str | None = None,
                  reviewed_at=None, recorded_via: str = "cli") -> bool:
    """Record one review outcome and close the item. reviewed_at: tz-aware (the CLI and the
    review page pass the time of entry); recorded_via: "cli" or "web" (the review page). Returns False when the same review (item, time, role) is already recorded.
    Raises ValueError for an unknown item or outcome, a missing role, or a review dated before
    the item was flagged."""
    outcome = normalise_outcome(outcome)
    if not role or not str(role).strip():
        raise ValueError("review: reviewer role is required")
    when = pd.Timestamp(reviewed_at)
    if when.tzinfo is None:
        raise ValueError("review: reviewed_at must carry a UTC offset")
    one = pd.DataFrame({"item_id": [str(item_id)], "reviewed_at": [when.tz_convert("UTC").as_unit("us")],
                        "reviewer_role": [str(role).strip()], "outcome": [outcome],
                        "note": [note if note else None]})
    with _write_transaction(engine) as conn:
        reason = _check_reviews(conn, one).iloc[0]
        if isinstance(reason, str):
            raise ValueError(f"review rejected: {reason}")
        if _duplicates(conn, one).iloc[0]:
            return False
        _apply_reviews(conn, one, recorded_via)
    return True


def record_missed_case(engine: Engine, patient_id: str, ecg_id: str, screen: str, role: str,
                       note: str | None = None, recorded_at=None) -> bool:
    """Record a missed case: an ECG of `patient_id` that `screen` should have flagged and did
    not, noted by a reviewer in `role` at `recorded_at` (tz-aware; the CLI passes the time of
    entry). Returns False when that ECG is already recorded as missed by that screen. Raises
    ValueError (naming the field, never its value) for an unknown screen, a missing patient,
    ECG or role, text over its documented length or holding a NUL byte, or a naive time."""
    from cardiosieve.screens import SCREENS

    if screen not in SCREENS:
        raise ValueError(f"missed case: unknown screen (known: {', '.join(SCREENS)})")
    fields = {"patient": patient_id, "ECG id": ecg_id, "reviewer role": role}
    for name, value in fields.items():
        if value is None or not str(value).strip():
            raise ValueError(f"missed case: {name} is required")
    text = {"reviewer role": (str(role).strip(), ROLE_MAX_CHARS), "note": (note or "", NOTE_MAX_CHARS)}
    for name, (value, limit) in text.items():
        if len(value) > limit:
            raise ValueError(f"missed case: {name} longer than {limit} characters")
        if "\x00" in value:
            raise ValueError(f"missed case: {name} holds a NUL byte")
    when = pd.Timestamp(recorded_at)
    if when.tzinfo is None:
        raise ValueError("missed case: the time must carry a UTC offset")
    row = {"patient_id": str(patient_id).strip(), "ecg_id": str(ecg_id).strip(), "screen": screen,
           "recorded_at": when.tz_convert("UTC"), "reviewer_role": str(role).strip(), "note": note or None}
    m = missed_case
    with _write_transaction(engine) as conn:
        known = conn.execute(select(func.count()).select_from(m).where(
            m.c.ecg_id == row["ecg_id"], m.c.screen == screen)).scalar()
        if known:
            return False
        conn.execute(insert(m), [row])
    return True


def _duplicates(conn: Connection, df: pd.DataFrame) -> pd.Series:
    """True where (item_id, reviewed_at, reviewer_role) is already stored or repeats an earlier row."""
    r = review
    ids = sorted(set(df["item_id"].astype(str)))
    have = _frame([row for i in range(0, len(ids), CHUNK) for row in conn.execute(
        select(r.c.item_id, r.c.reviewed_at, r.c.reviewer_role).where(r.c.item_id.in_(ids[i:i + CHUNK]))).all()],
        ["item_id", "reviewed_at", "reviewer_role"])
    key = df["item_id"].astype(str) + "|" + df["reviewed_at"].dt.strftime("%Y-%m-%dT%H:%M:%S.%f") + "|" + df["reviewer_role"]
    stored = set()
    if len(have):
        at = pd.to_datetime(have["reviewed_at"], utc=True).dt.strftime("%Y-%m-%dT%H:%M:%S.%f")
        stored = set(have["item_id"].astype(str) + "|" + at + "|" + have["reviewer_role"])
    return key.isin(stored) | key.duplicated()


_OFFSET = re.compile(r"(?:Z|[+-]\d\d(?::?\d\d)?)$", re.IGNORECASE)


def import_reviews_csv(engine: Engine, path, timezone: str | None = None) -> dict:
    """Import review outcomes exported by staff tools. CSV columns: item_id, reviewed_at (ISO 8601
    with a UTC offset; naive times only with `timezone`, an IANA name), reviewer_role, outcome
    (any case, spaces or hyphens for underscores), note (optional). Good rows are imported in
    one transaction; each bad row is rejected with its line number, column and reason; rows
    already recorded are counted as duplicates (re-importing a file changes nothing).
    Returns {"read", "imported", "duplicate", "rejected", "rejects": [{"line", "column", "reason"}]}.
    A missing required column raises ValueError (whole-file error)."""
    raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    raw.columns = [c.strip().lower() for c in raw.columns]
    missing = [c for c in REVIEW_CSV_REQUIRED if c not in raw.columns]
    if missing:
        raise ValueError(f"{Path(path).name}: missing column(s) {', '.join(missing)}")
    df = pd.DataFrame(index=raw.index)
    for c in REVIEW_CSV_REQUIRED + REVIEW_CSV_OPTIONAL:
        df[c] = raw[c].str.strip() if c in raw.columns else ""
    line = raw.index.to_series() + 2   # header is line 1
    df["outcome"] = df["outcome"].map(normalise_outcome)
    df["note"] = df["note"].where(df["note"].ne(""), None)

    text = df["reviewed_at"]
    aware = text.str.contains(_OFFSET, regex=True)
    at = pd.Series(pd.NaT, index=df.index, dtype="datetime64[us, UTC]")
    if aware.any():
        at[aware] = pd.to_datetime(text[aware], utc=True, errors="coerce", format="ISO8601").dt.as_unit("us")
    naive = ~aware & text.ne("")
    naive_parsed = pd.to_datetime(text.where(naive), errors="coerce", format="ISO8601")
    if timezone and naive.any():
        local = naive_parsed[naive].dt.tz_localize(timezone, ambiguous="NaT", nonexistent="NaT")
        at[naive] = local.dt.tz_convert("UTC").dt.as_unit("us")
    df["reviewed_at"] = at

    column = pd.Series(np.nan, index=df.index, dtype="str")
    reason = pd.Series(np.nan, index=df.index, dtype="str")

    def reject(mask, col, why):
        nonlocal column, reason
        mask = mask & reason.isna()
        column, reason = column.mask(mask, col), reason.mask(mask, why)

    for c in REVIEW_CSV_REQUIRED:
        reject(raw[c].str.strip().eq(""), c, REJECT_MISSING_VALUE)
    if not timezone:
        reject(naive & naive_parsed.notna(), "reviewed_at", REJECT_NAIVE_TIMESTAMP)
    reject(df["reviewed_at"].isna(), "reviewed_at", REJECT_UNPARSEABLE_TIMESTAMP)

    with _write_transaction(engine) as conn:
        later = _check_reviews(conn, df)
        col_of = {REJECT_UNKNOWN_ITEM: "item_id", REJECT_UNKNOWN_OUTCOME: "outcome",
                  REJECT_BEFORE_FLAGGED: "reviewed_at", REJECT_TEXT_TOO_LONG: "reviewer_role or note",
                  REJECT_INVALID_TEXT: "reviewer_role or note"}
        for why, col in col_of.items():
            reject(later.eq(why), col, why)
        good = df[reason.isna()]
        dup = _duplicates(conn, good) if len(good) else pd.Series(dtype=bool)
        new = good[~dup]
        imported = _apply_reviews(conn, new, "csv") if len(new) else 0
    bad = reason.notna()
    return {"read": int(len(df)), "imported": int(imported), "duplicate": int(dup.sum()),
            "rejected": int(bad.sum()),
            "rejects": [{"line": int(n), "column": c, "reason": w}
                        for n, c, w in zip(line[bad], column[bad], reason[bad])]}


# ---------------------------------------------------------------------------------------------
# Yield
# ---------------------------------------------------------------------------------------------
def wilson_interval(k, n, confidence: float = WILSON_CONFIDENCE):
    """Wilson score interval for k successes in n trials [WILSON-1927], from SciPy's
    binomtest(...).proportion_ci(method="wilson"); arrays in, (low, high) out; NaN where n == 0.
    One call per (screen, tier) group: a yield table has a dozen rows (0.7 ms each, measured)."""
    from scipy.stats import binomtest    # 2 s to import scipy.stats: only the yield report needs it

    k, n = np.broadcast_arrays(np.asarray(k, dtype=float), np.asarray(n, dtype=float))
    low, high = np.full(n.shape, np.nan), np.full(n.shape, np.nan)
    for i in np.ndindex(n.shape):        # a dozen groups, not rows
        if not n[i] > 0:
            continue
        ci = binomtest(int(k[i]), int(n[i])).proportion_ci(confidence_level=confidence, method="wilson")
        low[i], high[i] = ci.low, ci.high
    return low, high


YIELD_COLUMNS = ["screen", "tier", "items", "reviewed", OUTCOME_FINDING_REAL, OUTCOME_ALREADY_KNOWN,
                 OUTCOME_FINDING_NOT_REAL, OUTCOME_DATA_PROBLEM, "ppv", "ppv_low", "ppv_high",
                 "median_hours_to_review", "missed_cases_of_screen"]
YIELD_GROUPS = ("tier", "rule_version")   # the second grouping of a yield table, after screen


def _utc_bound(value) -> dt.datetime:
    when = pd.Timestamp(value)
    when = when.tz_localize("UTC") if when.tzinfo is None else when.tz_convert("UTC")
    return when.to_pydatetime()


def yield_table(engine: Engine, since=None, until=None, by: str = "tier") -> pd.DataFrame:
    """Per screen and tier (or rule version): items flagged in [since, until) (first_flagged_at;
    either bound may be None; a date without a time is midnight UTC), items reviewed, each item's
    latest outcome counted, PPV = (finding_real + already_known) / reviewed with its 95 % Wilson
    interval, and the median hours from first flag to first review. missed_cases_of_screen: the
    missed cases recorded for the screen in the same window (recorded_at), the same number on
    each of the screen's rows (it is the screen's, not the row's: do not add it up over rows); a
    screen with missed cases and no item flagged gets one row of its own, without tier.

    by="tier": the item's tier as stored. by="rule_version": the rule version an item was
    reviewed under (rule_version_at_review of its latest review, the one whose outcome counts),
    and for an item not reviewed yet its current rule_version; a column `rule_version` then
    stands where `tier` does."""
    if by not in YIELD_GROUPS:
        raise ValueError(f"yield: unknown grouping {by!r} (known: {', '.join(YIELD_GROUPS)})")
    from cardiosieve.pipeline.audit import first_reviews, hours_to_first_review

    t, r = worklist_item, review
    q = select(t.c.item_id, t.c.screen, t.c.tier, t.c.rule_version, t.c.first_flagged_at)
    if since is not None:
        q = q.where(t.c.first_flagged_at >= _utc_bound(since))
    if until is not None:
        q = q.where(t.c.first_flagged_at < _utc_bound(until))
    with engine.connect() as conn:
        items = _frame(conn.execute(q).all(), ["item_id", "screen", "tier", "rule_version", "first_flagged_at"])
        reviews = _frame(conn.execute(select(r.c.item_id, r.c.reviewed_at, r.c.outcome, r.c.review_id,
                                             r.c.rule_version_at_review)).all(),
                         ["item_id", "reviewed_at", "outcome", "review_id", "rule_version_at_review"])
        m = missed_case
        mq = select(m.c.screen, func.count()).group_by(m.c.screen)
        if since is not None:
            mq = mq.where(m.c.recorded_at >= _utc_bound(since))
        if until is not None:
            mq = mq.where(m.c.recorded_at < _utc_bound(until))
        missed = dict(conn.execute(mq).all())
    columns = YIELD_COLUMNS if by == "tier" else [by if c == "tier" else c for c in YIELD_COLUMNS]
    if items.empty and not missed:
        return pd.DataFrame({c: pd.Series(dtype="str" if c in ("screen", "rule_version") else float)
                             for c in columns})
    items["first_flagged_at"] = pd.to_datetime(items["first_flagged_at"], utc=True)
    reviews["reviewed_at"] = pd.to_datetime(reviews["reviewed_at"], utc=True)
    reviews = reviews.sort_values(["item_id", "reviewed_at", "review_id"])
    latest = reviews.drop_duplicates("item_id", keep="last")[["item_id", "outcome", "rule_version_at_review"]]
    items = items.merge(latest, on="item_id", how="left")
    items["hours"] = hours_to_first_review(items, first_reviews(reviews))
    if by == "rule_version":
        reviewed_under = items["rule_version_at_review"].where(items["outcome"].notna())
        items["rule_version"] = reviewed_under.fillna(items["rule_version"]).fillna("").astype("str")
    for o in OUTCOMES:
        items[o] = items["outcome"].eq(o).astype(int)
    g = items.groupby(["screen", by], sort=True)
    out = pd.DataFrame({"items": g.size(), "reviewed": g["outcome"].count(),
                        **{o: g[o].sum() for o in OUTCOMES},
                        "median_hours_to_review": g["hours"].median()}).reset_index()
    positives = out[list(TRUE_POSITIVE_OUTCOMES)].sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out["ppv"] = np.where(out["reviewed"] > 0, positives / out["reviewed"].where(out["reviewed"] > 0), np.nan)
    out["ppv_low"], out["ppv_high"] = wilson_interval(positives, out["reviewed"])
    if by == "tier":
        out["tier"] = out["tier"].astype("int64")
    alone = sorted(set(missed) - set(out["screen"]))
    if alone:   # missed cases of a screen that flagged nothing in the window: a row of their own
        extra = pd.DataFrame({"screen": alone, "items": 0, "reviewed": 0, **{o: 0 for o in OUTCOMES}})
        out = pd.concat([out, extra], ignore_index=True).sort_values(["screen", by], kind="mergesort")
        out = out.reset_index(drop=True)
        if by == "tier":
            out["tier"] = out["tier"].astype("Int64")
    out["missed_cases_of_screen"] = out["screen"].map(missed).fillna(0).astype("int64")
    return out[columns]


# ---------------------------------------------------------------------------------------------
# Export
# ---------------------------------------------------------------------------------------------
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
# Spreadsheets may drop leading blanks before they read a cell, so " =1+1" or "\n@SUM(A1)" are
# formulas too (OWASP, CSV injection).
_BLANKS_THEN_FORMULA = r"[ \t\r\n]+[=+\-@]"


def spreadsheet_safe(s: pd.Series) -> pd.Series:
    """Prefix text a spreadsheet would run as a formula with a quote (CSV injection): text that
    starts with a formula character, a tab or a carriage return, or with blanks and then a
    formula character."""
    text = s.astype("str")
    risky = text.str.startswith(_FORMULA_START, na=False) | text.str.match(_BLANKS_THEN_FORMULA, na=False)
    return text.mask(risky, "'" + text)


def spreadsheet_safe_frame(df: pd.DataFrame) -> pd.DataFrame:
    """`df` with every text column made spreadsheet-safe (spreadsheet_safe); other columns as they are."""
    out = df.copy()
    for c in out.columns:
        if out[c].dtype == "str":
            out[c] = spreadsheet_safe(out[c])
    return out


def export_items(engine: Engine, fmt: str = "csv", dest=None) -> int:
    """Write all stored items in rank order to `dest` (a path, or a text stream such as
    sys.stdout) as CSV for spreadsheets, the screening caution in a last column `caution` of
    every row (a spreadsheet loses file-level notes; a row copied elsewhere keeps it). A file is
    published whole and owner-only (pipeline.files.write_atomic). Returns the number of rows."""
    from cardiosieve.pipeline import CAUTION

    if fmt != "csv":
        raise ValueError(f"export: unknown format {fmt!r} (known: csv)")
    df = spreadsheet_safe_frame(read_items(engine))
    for c in TIMESTAMP_COLUMNS:
        df[c] = df[c].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    if dest is None:
        raise ValueError("export: no destination given")
    df["caution"] = CAUTION

    def write(target) -> None:
        df.to_csv(target, index=False, lineterminator="\n")

    if isinstance(dest, (str, os.PathLike)):   # a file: published whole (temporary file, rename)
        write_atomic(dest, write)
    else:
        write(dest)
    return len(df)
