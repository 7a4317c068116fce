"""`backfill --engine spark` (pipeline/sparkengine.py) against the local engine, output by output.

Spark runs in local mode (local[2]), one session for the module. Each case runs the same
interval through run.run_interval and through Spark, into two output folders, and compares
every published table row for row (the worklist, the aligned ECGs and the criterion tables in
their order too), the store's items, and the run summary's counts. The lakes: the bundled
sample lake; two generated site lakes of a year each, one of them with planted bad rows; and a
small lake whose patients share ECG and lab ids, the case the conflict bucket is for.
"""
from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from cardiosieve.pipeline.cli import EXIT_OK, main
from cardiosieve.pipeline.run import run_interval
from cardiosieve.pipeline.samplegen import generate
from cardiosieve.pipeline.store import open_store, read_items, sqlite_url
from tests.lake_builders import ecg_row, lab_row, lead_rows, patient_row, write_lake

# py4j leaves its sockets to the garbage collector.
pytestmark = pytest.mark.filterwarnings("ignore::ResourceWarning")

SAMPLE = Path(__file__).resolve().parents[1] / "sample_lake"
PUBLISHED = ("worklist.parquet", "aligned.parquet", "rejects.parquet", "criteria_hyperkalemia.parquet",
             "criteria_long_qt.parquet", "criteria_st_deviation.parquet")
IN_ORDER = {"worklist.parquet", "aligned.parquet", "criteria_hyperkalemia.parquet",
            "criteria_long_qt.parquet", "criteria_st_deviation.parquet"}


@pytest.fixture(scope="module")
def spark():
    from cardiosieve.pipeline.sparkengine import spark_session
    session = spark_session("local[2]", app="cardiosieve-tests")
    yield session
    session.stop()


def _both(lake, tmp_path, start, end, config=None, buckets=4, spark=None):
    from cardiosieve.pipeline.sparkengine import run_spark_interval
    local = run_interval(lake, tmp_path / "local", start, end, config=config)
    distributed = run_spark_interval(lake, tmp_path / "spark", start, end, config=config, buckets=buckets, spark=spark)
    return local, distributed


def _rows(df: pd.DataFrame) -> list[tuple]:
    return sorted(map(tuple, df.astype("str").to_numpy().tolist()))


def _assert_same_outputs(a: Path, b: Path) -> None:
    for name in PUBLISHED:
        assert (a / name).exists() == (b / name).exists(), name
        if not (a / name).exists():
            continue
        x, y = pd.read_parquet(a / name), pd.read_parquet(b / name)
        assert list(x.columns) == list(y.columns), name
        assert dict(x.dtypes) == dict(y.dtypes), name
        assert _rows(x) == _rows(y), name
        if name in IN_ORDER:
            pd.testing.assert_frame_equal(x, y, obj=name)
    pd.testing.assert_frame_equal(_store_items(a), _store_items(b), obj="store items")


def _store_items(out: Path) -> pd.DataFrame:
    engine = open_store(sqlite_url(out))
    try:
        return read_items(engine).sort_values("item_id", ignore_index=True)
    finally:
        engine.dispose()


def _counts(summary: dict) -> dict:
    tables = {t: {k: v for k, v in counts.items() if k != "files"} for t, counts in summary["tables"].items()}
    return {"tables": tables, "findings": summary["findings"], "rejects_by_reason": summary["rejects_by_reason"],
            "items_tonight": summary["worklist"]["items_tonight"], "db_counts": summary["worklist"]["db_counts"],
            "by_screen": summary["worklist"]["by_screen"], "chunks": summary["chunks"],
            "quality": {k: summary["quality"][k] for k in ("checks", "failed", "warnings", "rejected")}}


def test_the_sample_lake_gives_the_local_engines_outputs_row_for_row(spark, tmp_path):
    local, distributed = _both(SAMPLE, tmp_path, "2026-11-02", "2026-11-30", config=SAMPLE / "site.toml",
                               spark=spark)
    assert local["findings"] and local["rejects_by_reason"]          # something to compare
    _assert_same_outputs(tmp_path / "local", tmp_path / "spark")
    assert _counts(distributed) == _counts(local)
    assert distributed["engine"] == {"name": "spark", "master": "local[2]", "buckets": 4}
    assert not (tmp_path / "spark" / "_spark").exists()                # the work folder is removed
    on_disk = json.loads((tmp_path / "spark" / "run_summary.json").read_text())
    assert on_disk["engine"]["name"] == "spark"


@pytest.mark.parametrize("site, seed, bad_rows", [("north", 11, True), ("south", 12, False)])
def test_a_generated_site_year_gives_the_same_findings_and_rejects(spark, tmp_path, site, seed, bad_rows):
    """Two sites of a network, a year each, one with bad rows planted (every reject must match,
    with the lake's own file named)."""
    lake = tmp_path / site
    made = generate(lake, patients=120, days=365, end="2026-11-30", seed=seed, plant_bad_rows=bad_rows)
    assert (made.get("planted_bad_rows", 0) > 0) == bad_rows
    local, distributed = _both(lake, tmp_path, "2025-12-01", "2026-11-30", config=lake / "site.toml",
                               buckets=3, spark=spark)
    _assert_same_outputs(tmp_path / "local", tmp_path / "spark")
    assert _counts(distributed) == _counts(local)
    rejects = pd.read_parquet(tmp_path / "spark" / "rejects.parquet")
    assert (len(rejects) > 0) == bad_rows
    assert rejects["file"].map(lambda f: f == "" or Path(f).is_relative_to(lake)).all()


def _shared_ids_lake(root: Path) -> Path:
    """Patients P1, P3, P4, P5 and P7 with ECGs and potassium; P1 and P3 share an ECG id, P4
    and P6 a lab result id (each a duplicate the contract rejects, every copy); P5 has a lead
    row of an ECG no table holds; P7 is plain and screens."""
    night = "2026-11-29T{:02d}:00:00Z"
    ecgs = [ecg_row("E1", "P1", night.format(1)), ecg_row("E1", "P3", night.format(2)),
            ecg_row("E4", "P4", night.format(4)), ecg_row("E5", "P5", night.format(5)),
            ecg_row("E6", "P6", night.format(3)), ecg_row("E7", "P7", night.format(6), qrs_ms=150)]
    leads = [row for e in ("E1", "E4", "E5", "E6", "E7", "E_orphan") for row in lead_rows(e)]
    labs = [lab_row("R1", "P1", night.format(1)), lab_row("R4", "P4", night.format(2)),
            lab_row("R4", "P6", night.format(3)), lab_row("R7", "P7", night.format(5), value=7.1)]
    return write_lake(root, ecg=ecgs, leads=leads, labs=labs,
                      patients=[patient_row(f"P{i}") for i in (1, 3, 4, 5, 6, 7)])


def test_patients_sharing_ids_across_buckets_get_the_local_rejects(spark, tmp_path):
    lake = _shared_ids_lake(tmp_path / "lake")
    bucket = {r["p"]: r["b"] for r in spark.sql(
        "SELECT p, pmod(hash(p), 8) AS b FROM VALUES ('P1'), ('P3'), ('P4'), ('P6') AS t(p)").collect()}
    assert bucket["P1"] != bucket["P3"] and bucket["P4"] != bucket["P6"]     # the copies start apart
    local, distributed = _both(lake, tmp_path, "2026-11-29", "2026-11-30", buckets=8, spark=spark)
    rejects = pd.read_parquet(tmp_path / "local" / "rejects.parquet")
    assert {("ecg", "E1"), ("lab", "R4")} <= set(zip(rejects["table"], rejects["row_key"]))
    _assert_same_outputs(tmp_path / "local", tmp_path / "spark")
    assert _counts(distributed) == _counts(local)


def test_the_backfill_command_runs_either_engine(spark, tmp_path, capsys):
    args = ["--lake", str(SAMPLE), "--config", str(SAMPLE / "site.toml"), "--start", "2026-11-27",
            "--end", "2026-11-30"]
    assert main(["backfill", *args, "--out", str(tmp_path / "local")]) == EXIT_OK
    assert "engine:" not in capsys.readouterr().out
    assert main(["backfill", *args, "--out", str(tmp_path / "spark"), "--engine", "spark",
                 "--buckets", "2"]) == EXIT_OK
    printed = capsys.readouterr().out
    assert "engine: spark (master local[2], 2 patient buckets)" in printed
    _assert_same_outputs(tmp_path / "local", tmp_path / "spark")
    assert main(["backfill", *args, "--out", str(tmp_path / "x"), "--engine", "spark", "--buckets", "0"]) == 2
