"""Airflow for the DAG tests only: a throwaway AIRFLOW_HOME with a SQLite metadata database.

The environment is set when pytest imports this file, before any test module imports airflow
(airflow reads AIRFLOW_HOME once, at import). The database is migrated once per session, the
first time a test asks for it, so collecting the suite costs nothing.
"""
from __future__ import annotations

import atexit
import os
import pathlib
import shutil
import subprocess
import sys
import tempfile

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]
DAGS = REPO / "dags"
SAMPLE_LAKE = REPO / "sample_lake"
AIRFLOW_HOME = pathlib.Path(tempfile.mkdtemp(prefix="cardiosieve-airflow-"))
atexit.register(shutil.rmtree, AIRFLOW_HOME, ignore_errors=True)

os.environ.update({
    "AIRFLOW_HOME": str(AIRFLOW_HOME),
    "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
    "AIRFLOW__CORE__DAGS_FOLDER": str(DAGS),
    # INFO, so that the privacy scan sees everything the tasks and pipeline/ log.
    "AIRFLOW__LOGGING__LOGGING_LEVEL": "INFO",
})


@pytest.fixture(scope="session")
def airflow_db():
    """Migrate the metadata database (SQLite in AIRFLOW_HOME) once per session."""
    subprocess.run([sys.executable, "-m", "airflow", "db", "migrate"], check=True, capture_output=True)
    return AIRFLOW_HOME


@pytest.fixture(scope="session")
def dagbag():
    """The project's DAG folder parsed once (parsing needs no database)."""
    from airflow.dag_processing.dagbag import DagBag

    return DagBag(dag_folder=str(DAGS))


@pytest.fixture
def nightly(airflow_db):
    """The nightly DAG parsed afresh (0.1 s), ready for dag.test() against the throwaway
    metadata database. Fresh, because dag.test() runs tasks in this process and a run's conf
    is merged into the DAG object's own Params: a Param set by one test's run would otherwise
    leak into the next test's runs."""
    from airflow.dag_processing.dagbag import DagBag

    return DagBag(dag_folder=str(DAGS)).dags["cardiosieve_nightly"]
