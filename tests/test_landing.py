"""The landing check shared by the DAG's sensor and `cardiosieve run`: folder names only."""
from __future__ import annotations

import subprocess
import sys

from cardiosieve.pipeline.landing import interval_days, missing_exports


def test_landing_check_wants_every_utc_day_of_the_interval_and_the_marker_when_named(tmp_path):
    for day in ("2026-11-28", "2026-11-29"):
        (tmp_path / "ecg" / f"date={day}").mkdir(parents=True)
    (tmp_path / "ecg" / "date=2026-11-28" / "part-0.parquet").write_bytes(b"")
    assert missing_exports(str(tmp_path), "2026-11-28T00:00:00+00:00", "2026-11-29T00:00:00+00:00") == []
    # Half-open: an interval ending at midnight does not need the next day's partition; one
    # ending at 02:00 does, and an empty partition folder has not landed.
    assert missing_exports(str(tmp_path), "2026-11-28T02:00:00+00:00", "2026-11-29T02:00:00+00:00") == \
        ["ecg/date=2026-11-29/"]
    assert missing_exports(str(tmp_path), "2026-11-28T00:00:00+00:00", "2026-11-29T00:00:00+00:00",
                           marker="_SUCCESS") == ["ecg/date=2026-11-28/_SUCCESS"]
    (tmp_path / "ecg" / "date=2026-11-28" / "_SUCCESS").write_bytes(b"")
    assert missing_exports(str(tmp_path), "2026-11-28T00:00:00+00:00", "2026-11-29T00:00:00+00:00",
                           marker="_SUCCESS") == []
    assert missing_exports(str(tmp_path / "nowhere"), "2026-11-28", "2026-11-29") == ["ecg/"]


def test_unpartitioned_lake_counts_as_landed_when_ecg_holds_a_file(tmp_path):
    (tmp_path / "ecg").mkdir()
    assert missing_exports(str(tmp_path), "2026-11-28", "2026-11-29") == ["ecg/"]
    (tmp_path / "ecg" / "ecg.parquet").write_bytes(b"")
    assert missing_exports(str(tmp_path), "2026-11-28", "2026-11-29") == []


def test_interval_days_are_the_utc_days_the_half_open_interval_touches():
    assert [str(d) for d in interval_days("2026-11-29", "2026-11-30")] == ["2026-11-29"]
    # 23:00 to 01:00 at +02:00 is 21:00 to 23:00 UTC: one UTC day.
    assert [str(d) for d in interval_days("2026-11-29T23:00+02:00", "2026-11-30T01:00+02:00")] == ["2026-11-29"]
    assert [str(d) for d in interval_days("2026-11-28T06:00Z", "2026-11-30T06:00Z")] == \
        ["2026-11-28", "2026-11-29", "2026-11-30"]
    assert interval_days("2026-11-30", "2026-11-29") == []        # the run's own check words that


def test_the_landing_module_needs_only_the_standard_library():
    code = ("import sys, cardiosieve.pipeline.landing; "
            "print(sorted(m for m in ('pandas', 'pyarrow', 'numpy') if m in sys.modules))")
    got = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert got.stdout.strip() == "[]"
