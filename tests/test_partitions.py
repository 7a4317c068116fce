"""Partitions the runs cannot place: `validate` reports them lake-wide, a run stops on a
misnamed folder (pipeline/load.py docstring, docs/data-contract.md)."""
import pandas as pd
import pyarrow.parquet as pq
import pytest

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.config import settings_from_dict
from cardiosieve.pipeline.load import LakeError, read_table
from cardiosieve.pipeline.run import run_interval
from cardiosieve.pipeline.validate import validate_lake
from tests.lake_builders import ecg_row, lab_row, lead_rows, write_lake, write_partition

NIGHT = ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")


def _rows_in_files(lake, table: str) -> int:
    return sum(pq.ParquetFile(f).metadata.num_rows for f in (lake / table).rglob("*.parquet"))


def test_validate_finds_rows_outside_their_partition_over_the_whole_lake(tmp_path):
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("ok")])
    write_partition(lake, "ecg", "date=2026-11-22", [ecg_row("late", acquired_at="2026-11-29T10:00:00Z")])
    write_partition(lake, "lab", "date=2026-11-29", [lab_row("R-early", collected_at="2026-11-24T09:00:00Z")])
    got = validate_lake(lake)
    assert got["rejects_by_reason"] == {"ecg:outside_partition": 1, "lab:outside_partition": 1}
    for name in ("ecg", "lab"):
        assert got["tables"][name]["rows_in"] == _rows_in_files(lake, name)      # none vanishes
    # Over an interval: the rows of the partitions dated in it.
    by_reason = {day: validate_lake(lake, start=day, end=pd.Timestamp(day) + pd.Timedelta(days=1))["rejects_by_reason"]
                 for day in ("2026-11-22", "2026-11-29")}
    assert by_reason == {"2026-11-22": {"ecg:outside_partition": 1}, "2026-11-29": {"lab:outside_partition": 1}}


@pytest.mark.parametrize("folder", ["date=2026-13-01", "date=yesterday", "2026-11-29", "date=20261129"])
def test_validate_counts_every_row_of_a_misnamed_partition_folder(tmp_path, folder):
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("ok")])
    write_partition(lake, "ecg", folder, [ecg_row("lost-1"), ecg_row("lost-2")])
    write_partition(lake, "ecg_lead", folder, lead_rows("lost-1"))
    got = validate_lake(lake, out=tmp_path / "v")
    assert got["misnamed_partitions"] == {f"ecg/{folder}": 2, f"ecg_lead/{folder}": 12}
    assert got["rejects_by_reason"] == {"ecg:bad_partition_name": 2, "ecg_lead:bad_partition_name": 12}
    assert got["tables"]["ecg"] | {"files": 0} == {"rows_in": 3, "accepted": 1, "rejected": 2, "files": 0}
    rejects = pd.read_parquet(tmp_path / "v" / "validation_rejects.parquet")
    assert sorted(rejects.loc[rejects["table"] == "ecg", "row_key"]) == ["lost-1", "lost-2"]
    # Reported whatever interval is asked for: the folder has no date to place it by.
    elsewhere = validate_lake(lake, start="2020-01-01", end="2020-01-02")
    assert elsewhere["misnamed_partitions"] == got["misnamed_partitions"]


def test_a_run_stops_on_a_misnamed_partition_folder_naming_it_relative_to_the_lake(tmp_path, capsys):
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("ok", "P-secret")])
    write_partition(lake, "lab", "date=2026-13-01", [lab_row("R-secret", "P-secret")])
    with pytest.raises(LakeError, match=r"lab/date=2026-13-01 not named date=YYYY-MM-DD"):
        read_table(lake, c.LAB, settings_from_dict({}), scope="window", keep={"patient_id": ["P-secret"]})
    code = main(["run", "--lake", str(lake), "--out", str(tmp_path / "out"), "--start", NIGHT[0], "--end", NIGHT[1]])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "lab/date=2026-13-01" in err and str(tmp_path) not in err and "secret" not in err


def test_hidden_folders_are_set_aside_not_misnamed(tmp_path):
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("ok")])
    write_partition(lake, "ecg", "_date=2026-13-01", [ecg_row("set-aside")])
    write_partition(lake, "ecg", ".tmp", [ecg_row("in-flight")])
    got = validate_lake(lake)
    assert got["misnamed_partitions"] == {} and got["tables"]["ecg"]["rows_in"] == 1


def test_validate_via_the_cli_prints_the_new_reasons(tmp_path, capsys):
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("ok")])
    write_partition(lake, "ecg", "date=2026-11-29", [ecg_row("early", acquired_at="2026-11-20T10:00:00Z")])
    write_partition(lake, "ecg", "date=yesterday", [ecg_row("lost")])
    assert main(["validate", "--lake", str(lake)]) == 2
    out = capsys.readouterr().out
    assert "ecg:outside_partition" in out and "ecg:bad_partition_name" in out


def test_consecutive_runs_count_a_misfiled_lab_once_by_the_night_of_its_folder(tmp_path):
    """Both nights' lab look-back reads the 28th's folder; only the 28th's run rejects the
    result misfiled there, and neither night uses it as a potassium."""
    lake = write_lake(tmp_path / "lake", ecg=[ecg_row("E28", acquired_at="2026-11-28T10:00:00Z"),
                                              ecg_row("E29", acquired_at="2026-11-29T10:00:00Z")],
                      leads=lead_rows("E28") + lead_rows("E29"), labs=[lab_row("R-other", "P-other")])
    write_partition(lake, "lab", "date=2026-11-28", [lab_row("R-misfiled", collected_at="2026-11-20T09:00:00Z",
                                                             value=7.1)])
    outside = {}
    for day in ("2026-11-28", "2026-11-29"):
        out = tmp_path / f"out-{day}"
        end = (pd.Timestamp(day) + pd.Timedelta(days=1)).strftime("%Y-%m-%d")
        summary = run_interval(lake, out, day, end, quality=False)
        outside[day] = summary["rejects_by_reason"].get("lab:outside_partition", 0)
        assert summary["tables"]["lab"]["accepted"] == 0
    assert outside == {"2026-11-28": 1, "2026-11-29": 0}
