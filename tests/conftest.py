"""One PostgreSQL database per test process when the suite runs in parallel.

`make test` runs the suite in several processes (pytest-xdist, `-n auto` in pyproject.toml).
The PostgreSQL tests drop and create the store's tables in the database that
CARDIOSIEVE_TEST_PG_URL names, so two processes sharing it would undo each other's tables. Each
worker therefore gets its own database on the same server, made afresh here, before any test
module reads the variable (pytest imports this file first). Run alone (`-n0`), the suite uses
the named database itself, as before.
"""
from __future__ import annotations

import os


def _worker_database() -> None:
    url = os.environ.get("CARDIOSIEVE_TEST_PG_URL")
    worker = os.environ.get("PYTEST_XDIST_WORKER")          # gw0, gw1, ... under xdist only
    if not url or not worker:
        return
    from sqlalchemy import create_engine
    from sqlalchemy.engine import make_url

    # The run's id as well as the worker's: two suites on one server (two checkouts) never share.
    run = os.environ.get("PYTEST_XDIST_TESTRUNUID", "")[:12]
    name = f"cardiosieve_test_{run}_{worker}"
    server = create_engine(url, isolation_level="AUTOCOMMIT")
    with server.connect() as conn:
        conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        conn.exec_driver_sql(f'CREATE DATABASE "{name}"')
    server.dispose()
    _made.update(server=url, name=name)
    os.environ["CARDIOSIEVE_TEST_PG_URL"] = make_url(url).set(database=name).render_as_string(hide_password=False)


_made: dict[str, str] = {}


def pytest_sessionfinish(session, exitstatus):
    """Drop the worker's database at the end of its session."""
    if not _made:
        return
    from sqlalchemy import create_engine

    server = create_engine(_made["server"], isolation_level="AUTOCOMMIT")
    with server.connect() as conn:
        conn.exec_driver_sql(f'DROP DATABASE IF EXISTS "{_made["name"]}" WITH (FORCE)')
    server.dispose()


_worker_database()
