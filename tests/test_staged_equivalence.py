"""One run in one process publishes what the stages publish one at a time.

`cardiosieve run` hands each chunk through load, row checks, alignment, screens and worklist in
one process, with Great Expectations' verdict in a worker (pipeline/gateworker.py). The Airflow
tasks run the same stages one after another, each reading the files its predecessor wrote, with
the whole gate in-process (pipeline/run.py's stage_* functions). Whatever the in-process run
saves on the way, its published tables must be the stages' tables, value for value and in the
same order. Checked here over a generated year (samplegen's invented patients, with its planted
bad rows) run as a backfill in chunks, so that episode folding and the rank carry across chunks.
"""
from __future__ import annotations

import json
import shutil

import pandas as pd
import pytest

from cardiosieve.pipeline import run as r
from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.samplegen import generate

YEAR = ("2025-11-30T00:00:00Z", "2026-11-30T00:00:00Z")
PUBLISHED = ("worklist.parquet", "aligned.parquet", "rejects.parquet", "criteria_hyperkalemia.parquet",
             "criteria_long_qt.parquet", "criteria_st_deviation.parquet")


@pytest.fixture(scope="module")
def year_lake(tmp_path_factory):
    """A year of 1,200 invented patients (about 3,800 ECGs, some each night). The generator's labs taper off over
    its last days (repeats it never reaches), which the lab-volume check rightly stops as a
    thin feed; so, as bench/_common.py does, the lake runs a week past the year and that week
    is cut off."""
    lake = tmp_path_factory.mktemp("year") / "lake"
    generate(lake, patients=1200, days=372, end="2026-12-07", seed=20261204)
    for folder in lake.glob("*/date=*"):
        if folder.name[len("date="):] >= "2026-11-30":
            shutil.rmtree(folder)
    return lake


def staged_backfill(lake, out, start, end, config):
    """The backfill as separate stage calls, chunk by chunk, each stage reading the files of the
    one before (what the Airflow tasks do), the quality gate whole and in-process."""
    lo, hi = r.interval(start, end)
    bounds = r.chunk_bounds(lake, lo, hi)
    chunks = list(zip(bounds[:-1], bounds[1:]))
    parts = []
    for k, (a, b) in enumerate(chunks):
        last = k + 1 == len(chunks)
        part = {"tables": r.stage_load(lake, out, a, b, config=config)["tables"],
                "quality": r.stage_quality(lake, out, a, b, config=config),
                "aligned": r.stage_align(out, a, b, config=config, lake=lake)}
        part["findings"] = r.stage_screen(out, a, b, config=config)["by_screen_tier"]
        part["worklist"] = r.stage_worklist(out, a, b, config=config, write=last,
                                            earlier_run_ids=[r.chunk_run_id(x, y) for x, y in chunks[:k]] if last else [])
        parts.append(part)
    return r.stage_finish(out, lo, hi, r._add_up(parts) | {"chunks": len(parts)}, config=config, chunk_bounds=bounds)


def test_a_years_backfill_in_one_process_publishes_the_stages_tables(year_lake, tmp_path, monkeypatch):
    # Chunks of at most 400 ECG rows (about five weeks of this lake), as the run sizes them.
    monkeypatch.setattr(r, "CHUNK_ECG_ROWS", 400)
    config = year_lake / "site.toml"
    one, staged = tmp_path / "one", tmp_path / "staged"
    assert main(["run", "--lake", str(year_lake), "--config", str(config), "--out", str(one),
                 "--start", YEAR[0], "--end", YEAR[1]]) == 0
    summary = staged_backfill(year_lake, staged, *YEAR, config)
    assert summary["chunks"] >= 8
    for name in PUBLISHED:
        a, b = pd.read_parquet(one / name), pd.read_parquet(staged / name)
        pd.testing.assert_frame_equal(a, b, obj=name)
    # Not a comparison of two empty runs: the year has findings of every screen, planted bad
    # rows among the rejects, and items folded across chunk boundaries.
    worklist = pd.read_parquet(one / "worklist.parquet")
    assert set(worklist["screen"]) == {"hyperkalemia", "long_qt", "st_deviation"}
    assert len(pd.read_parquet(one / "aligned.parquet")) > 1000
    assert len(pd.read_parquet(one / "rejects.parquet")) > 0
    assert worklist["run_id"].nunique() > 1
    ran = json.loads((one / "run_summary.json").read_text())
    assert ran["findings"] == summary["findings"]
    # The run also counts the ECGs screened per table; every other count is the stages' own.
    assert {t: {k: n for k, n in v.items() if k != "screened"} for t, v in ran["tables"].items()} == summary["tables"]
    assert json.loads((one / "quality.json").read_text())["checks"] == \
        json.loads((staged / "quality.json").read_text())["checks"]
