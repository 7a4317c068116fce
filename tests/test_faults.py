"""Fault injection: a run killed with SIGKILL at each point of its path, two runs at once, and a
review racing a run, on SQLite and (when CARDIOSIEVE_TEST_PG_URL is set, as .ci/run does) on a
real PostgreSQL. What is asserted each time: every input row is accepted or rejected, every
review survives, and the published files all belong to one run, the previous one or the new one
(pipeline/publish.py). The kill points are pipeline/faults.py's.
"""
from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pandas as pd
import pytest

from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.faults import ENV, POINTS
from cardiosieve.pipeline.publish import BUILDING_PREFIX, CURRENT, RUNS_DIR, published_names
from cardiosieve.screens import SCREENS
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake

PG_URL = os.environ.get("CARDIOSIEVE_TEST_PG_URL")
needs_pg = pytest.mark.skipif(not PG_URL, reason="needs CARDIOSIEVE_TEST_PG_URL (set by .ci/run)")
NIGHT1 = ["--start", "2026-11-28", "--end", "2026-11-29"]
NIGHT2 = ["--start", "2026-11-29", "--end", "2026-11-30"]
CLI = str(Path(sys.executable).parent / "cardiosieve")
# Points where the store has not yet committed night 2 / where the new state is published.
BEFORE_COMMIT = POINTS[:POINTS.index("after_commit")]
PUBLISHED = ("after_switch",)


def _lake(root: Path) -> Path:
    """Two nights, each with ECGs that give findings (high potassium, long QT) and dull ones."""
    ecg, labs, patients = [], [], []
    for night, day in ((1, "2026-11-28"), (2, "2026-11-29")):
        for i in range(6):
            pid = f"P{night}{i}"
            ecg.append(ecg_row(f"E{night}{i}", pid, f"{day}T{8 + i:02d}:00:00Z",
                               qt_ms=560.0 if i == 1 else 400.0, qrs_ms=130.0 if i == 0 else 90.0))
            labs.append(lab_row(f"R{night}{i}", pid, f"{day}T{7 + i:02d}:00:00Z", value=7.1 if i == 0 else 4.3))
            patients.append(patient_row(pid))
    return write_lake(root / "lake", ecg=ecg, labs=labs, patients=patients)


def _run_args(lake, out, night, db=None) -> list[str]:
    return ["run", "--lake", str(lake), "--out", str(out), *night, *(["--db", db] if db else [])]


def _published(out: Path) -> dict:
    """What a reader of OUT sees: each published name's content (the run summary without its
    timings and paths, which differ between any two runs, and without the store's counts of
    what this run changed: a rerun after a committed night finds its items unchanged)."""
    seen = {}
    for name in published_names(SCREENS):
        path = out / name
        if not path.exists():
            continue
        if name == "run_summary.json":
            s = json.loads(path.read_text())
            s["worklist"].pop("db_counts")
            seen[name] = {k: v for k, v in s.items() if k not in ("seconds", "outputs", "run_folder", "quality")}
        elif name.endswith(".parquet"):
            seen[name] = pd.read_parquet(path).to_json(date_format="iso")
        else:
            seen[name] = path.read_bytes() if name != "quality.html" else len(path.read_bytes()) > 0
    return seen


def _every_row_counted(out: Path) -> None:
    summary = json.loads((out / "run_summary.json").read_text())
    for name, t in summary["tables"].items():
        assert t["rows_in"] == t["accepted"] + t["rejected"], name


def _leftovers(out: Path) -> list[str]:
    left = [*out.glob(".*.tmp"), *out.glob(".*.link"), *out.glob("_stage/*/.*.tmp"),
            *out.glob(f"{RUNS_DIR}/{BUILDING_PREFIX}*")]
    return [p.name for p in left]


def _kill_at(point: str, lake, out, db=None) -> int:
    proc = subprocess.run([CLI, *_run_args(lake, out, NIGHT2, db)], env={**os.environ, ENV: point},
                          capture_output=True, text=True, timeout=300)
    return proc.returncode


def _review_first_item(db_url: str) -> str:
    from cardiosieve.pipeline.store import open_store, read_items, record_review

    engine = open_store(db_url)
    try:
        items = read_items(engine).sort_values("item_id")
        item = str(items["item_id"].iloc[0])
        assert record_review(engine, item, "finding_real", "night registrar", "seen",
                             pd.Timestamp("2026-11-29T06:00", tz="UTC"))
        return item
    finally:
        engine.dispose()


def _reviews(db_url: str) -> pd.DataFrame:
    from sqlalchemy import select

    from cardiosieve.pipeline.store import open_store, review
    engine = open_store(db_url)
    try:
        with engine.connect() as conn:
            return pd.DataFrame(conn.execute(select(review.c.item_id, review.c.outcome)).all())
    finally:
        engine.dispose()


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Night 1 and night 2 run cleanly on SQLite: what a reader must see after each, and OUT
    after night 1 with a review recorded (copied for each kill)."""
    from cardiosieve.pipeline.store import sqlite_url

    root = tmp_path_factory.mktemp("faults")
    lake = _lake(root)
    out = root / "ref"
    assert main(_run_args(lake, out, NIGHT1)) == 0
    item = _review_first_item(sqlite_url(out))
    after1 = _published(out)
    base = root / "after_night1"
    shutil.copytree(out, base, symlinks=True)
    assert main(_run_args(lake, out, NIGHT2)) == 0
    return {"lake": lake, "base": base, "night1": after1, "night2": _published(out), "item": item}


def test_the_two_nights_publish_different_states(reference):
    # Otherwise "the previous state or the new one" below would prove nothing.
    assert reference["night1"] != reference["night2"]
    assert set(reference["night1"]) >= {"worklist.parquet", "aligned.parquet", "rejects.parquet", "run_summary.json"}


@pytest.mark.parametrize("point", POINTS)
def test_a_run_killed_at_any_point_leaves_one_published_state_and_a_rerun_completes_it(reference, point, tmp_path):
    from cardiosieve.pipeline.store import sqlite_url

    out = tmp_path / "out"
    shutil.copytree(reference["base"], out, symlinks=True)
    assert _kill_at(point, reference["lake"], out) == -signal.SIGKILL
    seen = _published(out)
    assert seen == (reference["night2"] if point in PUBLISHED else reference["night1"])
    if point not in PUBLISHED:
        assert (out / CURRENT).resolve().parent == (out / RUNS_DIR).resolve()
    # The next run of the night cleans up what the killed one left and publishes night 2 whole.
    assert main(_run_args(reference["lake"], out, NIGHT2)) == 0
    assert _published(out) == reference["night2"]
    assert _leftovers(out) == []
    _every_row_counted(out)
    assert _reviews(sqlite_url(out)).astype(str).values.tolist() == [[reference["item"], "finding_real"]]


def test_a_killed_run_leaves_temporary_files_that_the_next_run_removes(reference, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(reference["base"], out, symlinks=True)
    assert _kill_at("before_switch", reference["lake"], out) == -signal.SIGKILL
    assert any(n.startswith(BUILDING_PREFIX) for n in _leftovers(out))   # the unfinished run folder
    assert main(_run_args(reference["lake"], out, NIGHT1)) == 0          # any later run cleans up
    assert _leftovers(out) == []


@needs_pg
@pytest.mark.parametrize("point", ["after_screen", "after_commit", "before_switch", "after_switch"])
def test_a_run_killed_on_postgresql_loses_no_review_and_a_rerun_completes_it(reference, point, tmp_path):
    from tests.test_store import drop_everything

    drop_everything(PG_URL)
    try:
        lake, out = reference["lake"], tmp_path / "out"
        assert main(_run_args(lake, out, NIGHT1, PG_URL)) == 0
        item = _review_first_item(PG_URL)
        before = _published(out)
        assert _kill_at(point, lake, out, PG_URL) == -signal.SIGKILL
        assert _published(out) == before or point in PUBLISHED
        assert main(_run_args(lake, out, NIGHT2, PG_URL)) == 0
        _every_row_counted(out)
        assert _leftovers(out) == []
        assert _reviews(PG_URL).astype(str).values.tolist() == [[item, "finding_real"]]
        items = pd.read_parquet(out / "worklist.parquet")
        assert items.groupby(["patient_id", "screen"]).size().max() == 1
    finally:
        drop_everything(PG_URL)


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgresql", marks=needs_pg)])
def test_two_runs_at_once_on_one_store_never_double_an_item(reference, backend, tmp_path):
    from tests.test_store import drop_everything

    if backend == "postgresql":
        drop_everything(PG_URL)
    db = PG_URL if backend == "postgresql" else f"sqlite:///{tmp_path / 'store.sqlite'}"
    try:
        procs = [subprocess.Popen([CLI, *_run_args(reference["lake"], tmp_path / f"out{i}", NIGHT1, db)],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True) for i in (1, 2)]
        errs = [p.communicate(timeout=300)[1] for p in procs]
        assert all("Traceback" not in e for e in errs)
        assert sorted(p.returncode for p in procs) in ([0, 0], [0, 2])
        from cardiosieve.pipeline.store import open_store, read_items
        engine = open_store(db)
        items = read_items(engine)
        engine.dispose()
        assert len(items) and items.groupby(["patient_id", "screen"]).size().max() == 1
    finally:
        if backend == "postgresql":
            drop_everything(PG_URL)


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgresql", marks=needs_pg)])
def test_reviews_recorded_while_a_run_publishes_all_survive(reference, backend, tmp_path):
    # Staff review night 1's items while night 2 runs in another process: every review recorded
    # is in the store afterwards and its item is not open again.
    from cardiosieve.pipeline.store import open_store, read_items, record_review, sqlite_url
    from tests.test_store import drop_everything

    lake, out = reference["lake"], tmp_path / "out"
    db = PG_URL if backend == "postgresql" else None
    if db:
        drop_everything(PG_URL)
    url = db or sqlite_url(out)
    try:
        assert main(_run_args(lake, out, NIGHT1, db)) == 0
        engine = open_store(url)
        items = read_items(engine)["item_id"].astype(str).tolist()
        proc = subprocess.Popen([CLI, *_run_args(lake, out, NIGHT2, db)], stdout=subprocess.DEVNULL,
                                stderr=subprocess.PIPE, text=True)
        recorded, errors = [], []

        def review_all():                         # until the run ends: each round a new review per item
            at = pd.Timestamp("2026-11-29T07:00", tz="UTC")
            while True:
                running = proc.poll() is None
                for item in items:
                    at += pd.Timedelta(seconds=1)
                    try:
                        if record_review(engine, item, "already_known", "day consultant", None, at):
                            recorded.append(item)
                    except Exception as exc:      # noqa: BLE001 - reported by the assertion below
                        errors.append(type(exc).__name__)
                if not running:
                    return

        worker = threading.Thread(target=review_all)
        worker.start()
        worker.join(timeout=300)
        err = proc.communicate(timeout=300)[1]
        assert proc.returncode == 0 and "Traceback" not in err and errors == [], err[-2000:]
        assert len(recorded) > len(items)         # reviews went on while the run ran
        stored = read_items(engine).set_index(read_items(engine)["item_id"].astype(str))
        assert sorted(_reviews(url)["item_id"].astype(str)) == sorted(recorded)
        assert (stored.loc[items, "status"] != "open").all()
        engine.dispose()
    finally:
        if db:
            drop_everything(PG_URL)
