"""One run at a time per output folder and store (pipeline/runlock.py)."""

import fcntl
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.runlock import LOCK_NAME, PG_LOCK_KEY
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake
from tests.modes import any_umask, mode  # noqa: F401 (any_umask is a fixture)

ARGS = ["--start", "2026-11-29", "--end", "2026-11-30"]
PG_URL = os.environ.get("CARDIOSIEVE_TEST_PG_URL")


def _lake(tmp_path):
    return write_lake(tmp_path / "lake", ecg=[ecg_row("E1", "P1")], labs=[lab_row("R1", "P1", value=6.9)],
                      patients=[patient_row("P1")])


def test_a_second_run_on_a_locked_out_exits_2_with_one_line_and_writes_nothing(tmp_path, capsys):
    lake, out = _lake(tmp_path), tmp_path / "out"
    out.mkdir()
    with open(out / LOCK_NAME, "a+") as held:       # another run holds OUT
        fcntl.flock(held.fileno(), fcntl.LOCK_EX)
        assert main(["run", "--lake", str(lake), "--out", str(out), *ARGS]) == 2
        err = capsys.readouterr().err.strip()
        assert "another cardiosieve run holds" in err and len(err.splitlines()) == 1
        assert not (out / "worklist.parquet").exists() and not (out / "worklist.sqlite").exists()
    # Released: the next run goes through, and so does a rerun (the lock goes with the run).
    assert main(["run", "--lake", str(lake), "--out", str(out), *ARGS]) == 0
    assert main(["run", "--lake", str(lake), "--out", str(out), *ARGS]) == 0


def test_the_lock_files_are_owner_only_whatever_the_umask(tmp_path, any_umask):
    lake, db = _lake(tmp_path), tmp_path / "store" / "worklist.sqlite"
    out = tmp_path / "out"
    db.parent.mkdir()
    assert main(["run", "--lake", str(lake), "--out", str(out), "--db", f"sqlite:///{db}", *ARGS]) == 0
    assert mode(out / LOCK_NAME) == 0o600 and mode(f"{db}.lock") == 0o600


def test_two_runs_on_one_sqlite_store_from_different_outs_are_serialised_by_its_lock(tmp_path, capsys):
    lake, db = _lake(tmp_path), tmp_path / "store" / "worklist.sqlite"
    db.parent.mkdir()
    with open(f"{db}.lock", "a+") as held:
        fcntl.flock(held.fileno(), fcntl.LOCK_EX)
        code = main(["run", "--lake", str(lake), "--out", str(tmp_path / "out2"), "--db", f"sqlite:///{db}", *ARGS])
        assert code == 2 and "worklist.sqlite.lock" in capsys.readouterr().err


def test_overlapping_runs_never_give_two_items_for_one_episode(tmp_path):
    # A real race: two processes start the same night on the same OUT at once. One may stop with
    # exit 2 (the lock), never both succeed into a doubled worklist.
    lake, out = _lake(tmp_path), tmp_path / "out"
    cmd = [str(Path(sys.executable).parent / "cardiosieve"), "run", "--lake", str(lake), "--out", str(out), *ARGS]
    procs = [subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    errs = [p.communicate(timeout=300)[1] for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert all("Traceback" not in e for e in errs)
    assert codes in ([0, 0], [0, 2])
    items = pd.read_parquet(out / "worklist.parquet")
    assert items.groupby(["patient_id", "screen"]).size().max() == 1


@pytest.mark.skipif(not PG_URL, reason="needs CARDIOSIEVE_TEST_PG_URL (set by .ci/run)")
def test_a_run_on_a_postgresql_store_held_by_another_run_exits_2(tmp_path, capsys):
    from sqlalchemy import create_engine, text

    lake = _lake(tmp_path)
    engine = create_engine(PG_URL)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT pg_try_advisory_lock(:k)"), {"k": PG_LOCK_KEY}).scalar()
        try:
            assert main(["run", "--lake", str(lake), "--out", str(tmp_path / "out"), "--db", PG_URL, *ARGS]) == 2
            assert "database's run lock" in capsys.readouterr().err
        finally:
            conn.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": PG_LOCK_KEY})
    engine.dispose()
