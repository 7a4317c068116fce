"""cardiosieve nightly screening as an Airflow 3 DAG factory: wiring only, the work is in pipeline/run.py.

`make_dag()` returns the DAG; a DAGs folder holds a two-line file that calls it
(dags/cardiosieve_nightly.py). Importing this module creates no DAG.

Each run screens the ECGs acquired in its data interval [start, end) (UTC). By default the interval
is one UTC calendar day, [D-1 00:00, D 00:00), the same days as the lake's ecg/date=... partitions;
the landing sensor then holds the run until `settle_min` after the interval's end and until the
night's exports are in the lake, and fails with a clear message after `landing_timeout_min`.

    check_exports_landed -> validate_contract -> quality_gate -> align -> screen
        -> publish_worklist -> write_run_summary

Tasks exchange counts and paths only (XCom lands in the Airflow database and the UI): never a
patient row, identifier or value. Bad data (unreadable lake, missing required column, failed
quality gate, unusable config or interval) fails the task at once, without retries; anything
else (a flaky mount, a database that is briefly away, OUT or the store held by a command-line
run: each task holds the run lock for its stage) is retried with exponential back-off.

Nothing here reads files, the network or the Airflow database at parse time: module level reads
only environment variables, and pandas, Great Expectations and cardiosieve.pipeline are imported
inside the tasks. See docs/airflow.md for deployment, Params and backfills.
"""
from __future__ import annotations

import logging
import os
from datetime import datetime, timedelta, timezone as dt_timezone

import pendulum
from airflow.sdk import (DAG, Asset, AsyncCallback, BaseSensorOperator, CronDataIntervalTimetable, DeadlineAlert,
                         DeadlineReference, Param, task)

DAG_ID = "cardiosieve_nightly"
# Deployment settings read from the environment when this module is imported (no I/O); they are
# the defaults of make_dag's arguments. docs/airflow.md lists them.
SCHEDULE_CRON = os.environ.get("CARDIOSIEVE_CRON", "0 0 * * *")          # interval bounds: UTC midnights
SCHEDULE_TIMEZONE = os.environ.get("CARDIOSIEVE_TIMEZONE", "UTC")
START_DATE = pendulum.parse(os.environ.get("CARDIOSIEVE_START_DATE", "2026-01-01T00:00:00Z"))
CATCHUP = os.environ.get("CARDIOSIEVE_CATCHUP", "false").strip().lower() in ("1", "true", "yes")


def _minutes(name: str) -> timedelta | None:
    """A positive whole number of minutes from the environment; None when unset or empty. A bad
    value is a ValueError at parse time: an import error the UI shows, not a silent default."""
    raw = os.environ.get(name, "").strip()
    if not raw:
        return None
    if not raw.isdigit() or int(raw) == 0:
        raise ValueError(f"{name}={raw!r}: expected a positive whole number of minutes")
    return timedelta(minutes=int(raw))


# How long after the end of its data interval a run must have finished before the missed-deadline
# callback fires; None (unset): no deadline.
DEADLINE_AFTER_END = _minutes("CARDIOSIEVE_DEADLINE_MIN")

# The published worklist, for DAGs that should run after it changes (schedule=[WORKLIST]).
WORKLIST = Asset(name="cardiosieve_worklist")

# Other failures (I/O, database) are retried from 2 minutes, doubling (plus Airflow's jitter), at most
# 30 minutes apart; after the third retry the task fails (local choice).
RETRIES = 3
RETRY_DELAY = timedelta(minutes=2)
RETRY_BACKOFF = 2.0
MAX_RETRY_DELAY = timedelta(minutes=30)
TASK_TIMEOUT = timedelta(hours=2)      # a hung mount must not hold a worker slot all day
POKE_INTERVAL = timedelta(minutes=10)


def make_params(**defaults) -> dict[str, Param]:
    """The DAG's Params, fresh objects on every call; `defaults` replaces the default of a Param
    by name (an unknown name is a TypeError, so a typo cannot pass unnoticed)."""
    env = os.environ.get
    spec = {
        "lake": (env("CARDIOSIEVE_LAKE", "/data/lake"), dict(type="string", minLength=1,
                 description="Lake folder holding ecg/, ecg_lead/, lab/, patient/ (and optionally medication/).")),
        "out": (env("CARDIOSIEVE_OUT", "/data/cardiosieve"), dict(type="string", minLength=1,
                description="Output folder: worklist.parquet, rejects.parquet, quality report, run summary.")),
        "config": (env("CARDIOSIEVE_CONFIG", ""), dict(type="string",
                   description="Site configuration (TOML, docs/configuration.md); empty = built-in defaults.")),
        "db": ("", dict(type="string",
               description="SQLAlchemy URL of the worklist database; empty = sqlite at OUT/worklist.sqlite "
                           "(or the connection below). Put credentials in a connection, not here.")),
        "db_conn_id": (env("CARDIOSIEVE_DB_CONN_ID", ""), dict(type="string",
                       description="Airflow connection (postgres or sqlite) holding the worklist database; "
                                   "used when `db` is empty.")),
        "start": (None, dict(type=["null", "string"],
                  description="Explicit first instant screened (ISO 8601, UTC when no offset); with `end` it "
                              "overrides the run's data interval. Needed for runs without one.")),
        "end": (None, dict(type=["null", "string"], description="Explicit end of the interval, excluded.")),
        "settle_min": (120, dict(type="integer", minimum=0, maximum=1440,
                       description="Minutes after the interval's end before the exports count as landed "
                                   "(late rows still arriving); 0 with a landing marker.")),
        "landing_timeout_min": (360, dict(type="integer", minimum=0, maximum=2880,
                                description="Minutes after interval end + settle_min to wait for the "
                                            "exports before failing.")),
        "landing_marker": ("", dict(type="string",
                           description="File name the exporter writes into a partition when it is "
                                       "complete (e.g. _SUCCESS); empty = any Parquet file counts.")),
    }
    unknown = sorted(set(defaults) - set(spec))
    if unknown:
        raise TypeError(f"make_dag: unknown Param(s) {', '.join(unknown)}; known: {', '.join(spec)}")
    return {name: Param(defaults.get(name, default), **kw) for name, (default, kw) in spec.items()}


PARAMS = make_params()       # the defaults, for reading; make_dag builds its own


# ---------------------------------------------------------------------------------------------
# Helpers: run inside tasks only

class StoreBusy(RuntimeError):
    """Another run, or a long review write, holds OUT or the worklist store: retried with back-off."""


def call_stage(fn, *args, lock: tuple[str, str | None] | None = None, **kwargs):
    """Run one pipeline stage; bad data (pipeline.errors.BadInputError) becomes
    AirflowFailException (no retries) with the stage's one-line message, which names files,
    tables, columns, checks and counts only. Anything else propagates and Airflow retries it with
    back-off: an OSError with errno (a flaky mount), a database briefly away. A store written by a
    newer cardiosieve (StoreSchemaError) is bad input too: retrying cannot mend it.

    `lock` = (out, db URL or None): hold the run lock of OUT and the store (pipeline/runlock.py)
    for the stage, so that a command-line run on the same OUT or store never interleaves with a
    task of this DAG (max_active_runs=1 keeps the DAG's own runs apart). A held lock, or a SQLite
    store kept locked past its busy timeout, is StoreBusy: the task is retried later."""
    from contextlib import nullcontext

    from airflow.sdk.exceptions import AirflowFailException
    from cardiosieve.pipeline.errors import BadInputError
    from cardiosieve.pipeline.runlock import RunLockError, run_lock
    from cardiosieve.pipeline.store import StoreLockedError, sqlite_url

    try:
        if lock is None:
            held = nullcontext()
        else:
            from cardiosieve.pipeline.run import usable_out
            out = usable_out(lock[0])
            held = run_lock(out, lock[1] or sqlite_url(out))
        with held:
            return fn(*args, **kwargs)
    except (RunLockError, StoreLockedError) as exc:
        raise StoreBusy(f"{type(exc).__name__}: {exc}") from None
    except BadInputError as exc:
        raise AirflowFailException(f"{type(exc).__name__}: {exc}") from None


def stage_lock(params) -> tuple[str, str | None]:
    """The `lock` argument of call_stage for this run's OUT and store."""
    return params["out"], worklist_db_url(params)


def run_interval_bounds(context) -> tuple[str, str]:
    """[start, end) of this run as ISO strings: explicit Params when given, else the data interval.
    A run with neither (e.g. a manual trigger without logical date) fails; never "now"."""
    from airflow.sdk.exceptions import AirflowFailException
    from cardiosieve.pipeline.run import RunError, interval

    params = context["params"]
    start, end = params.get("start"), params.get("end")
    if bool(start) != bool(end):
        raise AirflowFailException("RunError: set both Params `start` and `end`, or neither")
    if not start:
        lo, hi = context.get("data_interval_start"), context.get("data_interval_end")
        if lo is None or hi is None or lo == hi:
            raise AirflowFailException("RunError: this run has no data interval; trigger it with a "
                                       "logical date or set Params `start` and `end`")
        start, end = lo.isoformat(), hi.isoformat()
    try:
        lo, hi = interval(start, end)
    except RunError as exc:
        raise AirflowFailException(f"RunError: {exc}") from None
    return lo.isoformat(), hi.isoformat()


# libpq connection keywords taken from a postgres connection's extras and passed on as URL query
# parameters (psycopg hands them to libpq). Host, port, user, password and database come from the
# connection's own fields. Left out on purpose: sslpassword (a secret: it would sit in the URL's
# query, which SQLAlchemy does not mask like the password) and replication. Every other extra is
# ignored, in particular the Airflow postgres provider's own (cursor, iam, aws_conn_id,
# redshift, sqlalchemy_scheme, ...), which mean nothing to libpq.
LIBPQ_EXTRAS = (
    "sslmode", "sslrootcert", "sslcert", "sslkey", "sslcrl", "sslcrldir", "sslsni", "sslnegotiation",
    "sslcertmode", "ssl_min_protocol_version", "ssl_max_protocol_version", "requirepeer", "channel_binding",
    "require_auth", "gssencmode", "krbsrvname", "gsslib", "gssdelegation", "passfile", "service",
    "target_session_attrs", "load_balance_hosts", "connect_timeout", "application_name",
    "fallback_application_name", "options", "client_encoding", "keepalives", "keepalives_idle",
    "keepalives_interval", "keepalives_count", "tcp_user_timeout",
)


def connection_url(conn) -> str:
    """The SQLAlchemy URL of an Airflow connection of type postgres or sqlite (ConfigError as
    AirflowFailException otherwise). A postgres connection becomes postgresql+psycopg://, with
    login, password, host, port, *schema* as the database and the LIBPQ_EXTRAS among its extras
    as query parameters: postgres://u:p@h:5432/db?sslmode=verify-full&sslrootcert=/etc/ca.pem
    keeps its TLS options. The result holds the password: pass it on, never log it."""
    from airflow.sdk.exceptions import AirflowFailException
    from sqlalchemy.engine import URL

    kind = (conn.conn_type or "").lower()
    if kind == "sqlite":                   # Airflow's sqlite connections keep the file path in host
        return f"sqlite:///{conn.host}"
    if kind not in ("postgres", "postgresql"):
        raise AirflowFailException(f"ConfigError: connection {conn.conn_id!r} has type {kind!r}; "
                                   "cardiosieve takes postgres or sqlite")
    extras = conn.extra_dejson or {}
    query = {k: _libpq_value(extras[k]) for k in LIBPQ_EXTRAS if extras.get(k) not in (None, "")}
    return URL.create("postgresql+psycopg", username=conn.login or None, password=conn.password or None,
                      host=conn.host or None, port=conn.port or None, database=conn.schema or None,
                      query=query).render_as_string(hide_password=False)


def _libpq_value(value) -> str:
    if isinstance(value, bool):            # JSON extras: {"keepalives": true}; libpq wants 1 / 0
        return "1" if value else "0"
    return str(value)


def worklist_db_url(params) -> str | None:
    """The worklist database: Param `db`, else the Airflow connection `db_conn_id` (see
    connection_url), else None (stage_worklist then uses sqlite at OUT/worklist.sqlite)."""
    if params.get("db"):
        return params["db"]
    conn_id = params.get("db_conn_id")
    if not conn_id:
        return None
    from airflow.sdk import BaseHook
    from airflow.sdk.exceptions import AirflowFailException, AirflowNotFoundException

    try:
        conn = BaseHook.get_connection(conn_id)
    except AirflowNotFoundException:       # a typo in the Param: no retry will define it
        raise AirflowFailException(f"ConfigError: Airflow connection {conn_id!r} is not defined") from None
    return connection_url(conn)


class ExportsLandedSensor(BaseSensorOperator):
    """Waits (reschedule mode: no worker slot held) until the interval's ECG exports are in the
    lake and `settle_min` has passed since the interval's end; fails without retry, naming the
    missing partitions, once `landing_timeout_min` more has passed. The deadline is anchored to
    the interval's end, so a backfill of an old night whose export never came fails at once."""

    def poke(self, context) -> bool:
        from airflow.sdk.exceptions import AirflowFailException

        params = context["params"]
        start, end = run_interval_bounds(context)
        end_ts = pendulum.parse(end)
        ready_at = end_ts.add(minutes=params["settle_min"])
        deadline = ready_at.add(minutes=params["landing_timeout_min"])
        now = pendulum.now("UTC")          # when to start and give up only; never the data window
        if now < ready_at:
            self.log.info("interval ends %s; waiting until %s for late exports", end, ready_at.isoformat())
            return False
        from cardiosieve.pipeline.landing import missing_exports

        missing = missing_exports(params["lake"], start, end, params["landing_marker"])
        if not missing:
            self.log.info("exports landed for [%s, %s)", start, end)
            return True
        if now >= deadline:
            raise AirflowFailException(
                f"exports for [{start}, {end}) have not landed in lake {params['lake']} by "
                f"{deadline.isoformat()}: missing {', '.join(missing)}")
        self.log.info("still missing %d partition(s): %s", len(missing), ", ".join(missing))
        return False


# ---------------------------------------------------------------------------------------------
# Alerts: one log line each, names only. A callback never sees a row, but an exception's message
# may quote one (a database error can quote the row it choked on), so only its type is logged;
# the task's own log holds the message.

ALERT_LOG = logging.getLogger("cardiosieve.alerts")


def log_task_failure(context) -> None:
    """Default on_failure_callback of every task (called once a task has failed for good, after
    its retries): one ERROR line on logger cardiosieve.alerts in the task's log, with the DAG,
    run and task ids and the exception's type."""
    try:
        ti = context.get("ti") or context.get("task_instance")
        exc = context.get("exception")
        ALERT_LOG.error("cardiosieve task failed: dag_id=%s run_id=%s task_id=%s exception=%s",
                        getattr(ti, "dag_id", None), getattr(ti, "run_id", None) or context.get("run_id"),
                        getattr(ti, "task_id", None), type(exc).__name__ if exc is not None else None)
    except Exception:                          # an alert must never mask the failure it reports
        ALERT_LOG.error("cardiosieve task failed (the failure context could not be read)")


async def log_missed_deadline(context=None, **kwargs) -> None:
    """Default missed-deadline callback (runs in the triggerer, so it is async): one ERROR line
    on logger cardiosieve.alerts in the triggerer's log, with the DAG and run ids and the
    deadline. A backfill of past nights is late by design: INFO instead."""
    run = (context or {}).get("dag_run") or {}
    deadline = (context or {}).get("deadline") or {}
    backfill = str(run.get("run_type", "")).lower() == "backfill"
    ALERT_LOG.log(logging.INFO if backfill else logging.ERROR,
                  "cardiosieve run missed its deadline: dag_id=%s run_id=%s deadline=%s%s",
                  run.get("dag_id"), run.get("run_id"), deadline.get("deadline_time"),
                  " (backfill of a past night)" if backfill else "")


def interval_length(schedule: str, timezone: str, start_date) -> timedelta:
    """The length of the data intervals of cron `schedule` in `timezone`: the gap between the first
    two cron times after start_date (a day for the default; a DST night in a local time zone is an
    hour longer or shorter, which the deadline then ignores)."""
    from croniter import croniter               # Airflow's cron timetables use it too

    first = pendulum.instance(start_date).in_timezone(pendulum.timezone(timezone))
    times = croniter(schedule, first)
    a, b = times.get_next(datetime), times.get_next(datetime)
    return b.astimezone(dt_timezone.utc) - a.astimezone(dt_timezone.utc)


def nightly_deadline(after_end: timedelta, *, schedule: str = SCHEDULE_CRON, timezone: str = SCHEDULE_TIMEZONE,
                     start_date=START_DATE, callback=None) -> DeadlineAlert:
    """A DeadlineAlert `after_end` after the end of each run's data interval. Airflow 3.3 counts a
    deadline from a reference such as the run's logical date, which for this timetable is the
    interval's start, so the interval's length is added. `callback`: an AsyncCallback or
    SyncCallback; default log_missed_deadline."""
    return DeadlineAlert(reference=DeadlineReference.DAGRUN_LOGICAL_DATE,
                         interval=interval_length(schedule, timezone, start_date) + after_end,
                         callback=callback or AsyncCallback(log_missed_deadline), name="cardiosieve_nightly_late")


# ---------------------------------------------------------------------------------------------
# The DAG

def make_dag(dag_id: str = DAG_ID, *, schedule: str = SCHEDULE_CRON, timezone: str = SCHEDULE_TIMEZONE,
             start_date=START_DATE, catchup: bool = CATCHUP, params: dict | None = None,
             worklist_asset: Asset = WORKLIST, on_failure_callback=log_task_failure,
             deadline: timedelta | DeadlineAlert | None = DEADLINE_AFTER_END, on_deadline_missed=None,
             tags: tuple[str, ...] = ("cardiosieve",)) -> DAG:
    """The nightly screening DAG.

    `schedule` is the cron of the interval bounds, read in `timezone`; `params` gives other
    defaults to the Params by name (e.g. {"lake": "/data/lake-b", "out": "/data/cs-b",
    "db_conn_id": "cs_b_worklist"}); `worklist_asset` is the asset the publish task updates
    (give a second DAG its own, or its downstream DAGs run for both).

    Alerts: `on_failure_callback` is every task's (default log_task_failure; None for none; a
    notifier works too). `deadline`: how long after the end of its data interval a run must have
    finished (a timedelta, see nightly_deadline; or a DeadlineAlert as it is; None for none),
    `on_deadline_missed` its callback (default log_missed_deadline).

    The defaults come from the CARDIOSIEVE_* environment variables (docs/airflow.md)."""
    if isinstance(deadline, timedelta):
        deadline = nightly_deadline(deadline, schedule=schedule, timezone=timezone, start_date=start_date,
                                    callback=on_deadline_missed)
    with DAG(
        dag_id=dag_id,
        schedule=CronDataIntervalTimetable(schedule, timezone=timezone),
        start_date=start_date,
        catchup=catchup,
        max_active_runs=1,        # nights share OUT and the worklist database; episodes fold in order
        params=make_params(**(params or {})),
        tags=list(tags),
        default_args={"retries": RETRIES, "retry_delay": RETRY_DELAY, "retry_exponential_backoff": RETRY_BACKOFF,
                      "max_retry_delay": MAX_RETRY_DELAY, "execution_timeout": TASK_TIMEOUT,
                      "on_failure_callback": on_failure_callback},
        deadline=deadline,
        description="Screen the ECGs acquired in each run's interval; publish the worklist for human review.",
        doc_md=__doc__,
    ) as nightly:
        landed = ExportsLandedSensor(task_id="check_exports_landed", mode="reschedule",
                                     poke_interval=POKE_INTERVAL, timeout=timedelta(days=3))

        @task
        def validate_contract(**context) -> dict:
            """Read the night and its context against the lake contract; write stage files and rejects."""
            from cardiosieve.pipeline.publish import clean_leftovers
            from cardiosieve.pipeline.run import stage_load

            def load(*args, **kwargs):
                clean_leftovers(params["out"])          # what a crashed run left behind, under the lock
                return stage_load(*args, **kwargs)

            params = context["params"]
            start, end = run_interval_bounds(context)
            loaded = call_stage(load, params["lake"], params["out"], start, end, config=params["config"] or None,
                                lock=stage_lock(params))
            return {**loaded, "start": start, "end": end}

        @task
        def quality_gate(loaded: dict, params=None) -> dict:
            """Great Expectations gate; writes OUT/quality.json and .html even when it stops the run."""
            from cardiosieve.pipeline.run import stage_quality

            return call_stage(stage_quality, params["lake"], params["out"], loaded["start"], loaded["end"],
                              config=params["config"] or None, lock=stage_lock(params))

        @task
        def align(loaded: dict, quality: dict, params=None) -> dict:
            from cardiosieve.pipeline.run import stage_align

            return call_stage(stage_align, params["out"], loaded["start"], loaded["end"],
                              config=params["config"] or None, lake=params["lake"], lock=stage_lock(params))

        @task
        def screen(loaded: dict, aligned: dict, params=None) -> dict:
            from cardiosieve.pipeline.run import stage_screen

            return call_stage(stage_screen, params["out"], loaded["start"], loaded["end"], config=params["config"] or None,
                              lock=stage_lock(params))

        @task(outlets=[worklist_asset])
        def publish_worklist(loaded: dict, screened: dict, params=None, outlet_events=None) -> dict:
            """Build the worklist items, upsert them in one transaction, write OUT/worklist.parquet."""
            from cardiosieve.pipeline.run import stage_worklist

            published = call_stage(stage_worklist, params["out"], loaded["start"], loaded["end"],
                                   config=params["config"] or None, db=worklist_db_url(params), lock=stage_lock(params))
            outlet_events[worklist_asset].extra = {"interval": [loaded["start"], loaded["end"]],
                                                   "items_tonight": published["items_tonight"]}
            return published

        @task
        def write_run_summary(loaded: dict, quality: dict, aligned: dict, screened: dict, published: dict,
                              params=None) -> dict:
            """OUT/rejects.parquet (every reject of the interval), OUT/aligned.parquet and
            OUT/run_summary.json, as the CLI writes them; returns the outputs' paths."""
            from cardiosieve.pipeline.run import stage_finish

            tables = loaded["tables"]
            tables["ecg"]["screened"] = aligned["aligned"]
            summary = {"tables": tables, "quality": quality, "aligned": aligned,
                       "findings": screened["by_screen_tier"], "worklist": published}
            done = call_stage(stage_finish, params["out"], loaded["start"], loaded["end"], summary,
                              config=params["config"] or None, lock=stage_lock(params))
            return done["outputs"]

        loaded = validate_contract()
        quality = quality_gate(loaded)
        aligned = align(loaded, quality)
        screened = screen(loaded, aligned)
        published = publish_worklist(loaded, screened)
        landed >> loaded
        write_run_summary(loaded, quality, aligned, screened, published)

    return nightly
