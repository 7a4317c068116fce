"""The quality gate's verdict in a worker process (pipeline/gateworker.py): a failed verdict
stops the run before the store or the outputs change, a dead worker is an internal error that
publishes nothing, and the worker never outlives the run."""
from __future__ import annotations

import json
from pathlib import Path

import pytest

from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.gateworker import GateWorker, GateWorkerError
from cardiosieve.pipeline.run import run_interval
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake

NIGHT1 = ("2026-11-28", "2026-11-29")
NIGHT2 = ("2026-11-29", "2026-11-30")


def _lake(tmp_path, night2_qt=400.0, n=6):
    """Two nights of `n` ECGs; night 2's QT values set by `night2_qt` (a list or one value)."""
    qts = night2_qt if isinstance(night2_qt, list) else [night2_qt] * n
    ecg, labs, patients = [], [], []
    for night, day in ((1, NIGHT1[0]), (2, NIGHT2[0])):
        for i in range(n):
            pid = f"P{night}{i:02d}"
            at = f"{day}T{8 + i // 4:02d}:{i % 4 * 10:02d}:00Z"
            ecg.append(ecg_row(f"E{night}{i:02d}", pid, at, qt_ms=qts[i] if night == 2 else 400.0))
            labs.append(lab_row(f"R{night}{i:02d}", pid, f"{day}T07:{i:02d}:00Z", value=7.1 if i == 0 else 4.3))
            patients.append(patient_row(pid))
    return write_lake(tmp_path / "lake", ecg=ecg, labs=labs, patients=patients)


def _items(out):
    from cardiosieve.pipeline.store import open_store, read_items, sqlite_url
    engine = open_store(sqlite_url(out))
    try:
        return read_items(engine)
    finally:
        engine.dispose()


def test_a_night_the_gate_stops_exits_2_and_leaves_the_store_and_the_published_night_alone(tmp_path, capsys):
    # Two of six QTs of 750 ms: within the contract's bounds, outside the gate's plausible
    # 200-700 ms, 33 % of the night: critical (docs/quality.md).
    lake, out = _lake(tmp_path, night2_qt=[400.0, 750.0, 400.0, 750.0, 400.0, 400.0]), tmp_path / "out"
    assert main(["run", "--lake", str(lake), "--out", str(out), "--start", NIGHT1[0], "--end", NIGHT1[1]]) == 0
    published = (out / "current").resolve()
    items = _items(out)
    capsys.readouterr()
    assert main(["run", "--lake", str(lake), "--out", str(out), "--start", NIGHT2[0], "--end", NIGHT2[1]]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "ecg_qt_ms_plausible" in err
    assert f"report {out / 'gate_stopped' / 'quality.html'}" in err
    report = json.loads((out / "gate_stopped" / "quality.json").read_text())
    assert report["passed"] is False and any("ecg_qt_ms_plausible" in m for m in report["critical_failures"])
    assert (out / "current").resolve() == published                     # night 1 still published
    assert _items(out).equals(items)                                      # nothing of night 2 stored
    import pandas as pd
    assert not pd.read_parquet(out / "worklist.parquet")["patient_id"].str.startswith("P2").any()


def test_a_passing_verdict_and_the_row_checks_reject_the_same_rows(tmp_path):
    # One implausible QT among 25 ECGs (4 %): a warning, the row rejected, the night published.
    lake, out = _lake(tmp_path, night2_qt=[400.0, 750.0] + [400.0] * 23, n=25), tmp_path / "out"
    summary = run_interval(lake, out, *NIGHT2)
    assert summary["quality"]["rejects_by_check"] == {"quality:ecg_qt_ms_plausible": 1}
    import pandas as pd
    rejects = pd.read_parquet(out / "rejects.parquet")
    assert rejects.loc[rejects["reason"].str.startswith("quality:"), "row_key"].tolist() == ["E201"]
    aligned = pd.read_parquet(out / "aligned.parquet")
    assert "E201" not in set(aligned["ecg_id"]) and len(aligned) == 24
    report = json.loads((out / "quality.json").read_text())
    agree = [k for k in report["checks"] if k["check"].endswith("_evaluators_agree")]
    assert agree and all(k["passed"] for k in agree)                     # Great Expectations ran too


def test_a_worker_that_dies_is_an_internal_error_and_nothing_is_published(tmp_path):
    lake, out = _lake(tmp_path), tmp_path / "out"
    with GateWorker() as gate:
        gate.proc.kill()
        gate.proc.wait()
        with pytest.raises(GateWorkerError):
            run_interval(lake, out, *NIGHT2, gate=gate)
    assert not (out / "current").exists() and not (out / "worklist.parquet").exists()
    assert _items(out).empty


def test_the_worker_ends_with_the_run_and_with_a_run_that_stops_early(tmp_path):
    lake, out = _lake(tmp_path), tmp_path / "out"
    with GateWorker() as gate:
        run_interval(lake, out, *NIGHT2, gate=gate)
        assert gate.proc.poll() is None              # still serving inside the block
    assert gate.proc.poll() is not None
    bad = tmp_path / "bad.toml"
    bad.write_text("timzone = 'UTC'\n")
    with GateWorker(bad) as early:
        assert main(["run", "--lake", str(lake), "--out", str(out), "--config", str(bad),
                     "--start", NIGHT2[0], "--end", NIGHT2[1]]) == 2
    assert early.proc.poll() is not None


def test_the_split_gate_publishes_what_the_gate_in_one_process_publishes(tmp_path):
    """`cardiosieve run` (row checks here, verdict in the worker) and the stages one after the
    other with the whole gate in-process (what the Airflow tasks do) give the same worklist,
    aligned table and rejects on the sample lake's last night."""
    import pandas as pd

    from cardiosieve.pipeline import run as r

    lake = Path(__file__).resolve().parents[1] / "sample_lake"
    config, night = lake / "site.toml", ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")
    split, whole = tmp_path / "split", tmp_path / "whole"
    assert main(["run", "--lake", str(lake), "--config", str(config), "--out", str(split),
                 "--start", night[0], "--end", night[1]]) == 0
    loaded = r.stage_load(lake, whole, *night, config=config)
    summary = {"tables": loaded["tables"], "quality": r.stage_quality(lake, whole, *night, config=config),
               "aligned": r.stage_align(whole, *night, config=config, lake=lake)}
    summary["findings"] = r.stage_screen(whole, *night, config=config)["by_screen_tier"]
    summary["worklist"] = r.stage_worklist(whole, *night, config=config)
    r.stage_finish(whole, *night, summary, config=config)
    for name in ("worklist.parquet", "aligned.parquet", "rejects.parquet", "criteria_st_deviation.parquet"):
        a, b = pd.read_parquet(split / name), pd.read_parquet(whole / name)
        pd.testing.assert_frame_equal(a, b, check_like=False, obj=name)
    assert len(pd.read_parquet(split / "worklist.parquet")) > 0
    assert json.loads((split / "quality.json").read_text())["checks"] == \
        json.loads((whole / "quality.json").read_text())["checks"]
