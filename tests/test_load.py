"""Reading the lake: partition pruning, schema groups, corrupt files, duplicates, reconciliation."""
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.codes import LOINC_SODIUM
from cardiosieve.pipeline.config import settings_from_dict
from cardiosieve.pipeline.load import LakeError, read_table, table_files
from cardiosieve.pipeline.run import stage_align, stage_load
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake, write_partition, write_table

DEFAULT = settings_from_dict({})
NIGHT = (pd.Timestamp("2026-11-29T00:00Z"), pd.Timestamp("2026-11-30T00:00Z"))


def night_of(day: str) -> tuple[pd.Timestamp, pd.Timestamp]:
    lo = pd.Timestamp(day, tz="UTC")
    return lo, lo + pd.Timedelta(days=1)


def test_only_partitions_inside_the_window_are_listed(tmp_path):
    days = pd.date_range("2020-01-01", "2026-11-30", freq="7D", tz="UTC")
    write_table(tmp_path, "ecg", [ecg_row(f"E{i}", acquired_at=str(d)) for i, d in enumerate(days)], "acquired_at")
    files = table_files(tmp_path, c.ECG, "2026-11-20", "2026-11-30")
    assert [f.parent.name for f in files] == sorted(f"date={d:%Y-%m-%d}" for d in days if d >= pd.Timestamp("2026-11-20", tz="UTC"))


def test_night_read_returns_only_the_interval_and_reconciles(tmp_path):
    write_table(tmp_path, "ecg", [ecg_row("before", acquired_at="2026-11-28T23:59:59Z"),
                                  ecg_row("first", acquired_at="2026-11-29T00:00:00Z"),
                                  ecg_row("bad", acquired_at="2026-11-29T05:00:00Z", qt_ms=5000.0),
                                  ecg_row("last", acquired_at="2026-11-29T23:59:59Z"),
                                  ecg_row("after", acquired_at="2026-11-30T00:00:00Z")], "acquired_at")
    got = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert sorted(got.clean["ecg_id"]) == ["first", "last"]          # half-open [start, end)
    assert got.rejects["row_key"].tolist() == ["bad"] and got.rows_in == 3


def test_a_file_of_naive_timestamps_is_not_silently_read_as_utc(tmp_path):
    write_table(tmp_path, "lab", [lab_row("aware")], "collected_at")
    naive = pd.DataFrame([lab_row("naive")])
    naive["collected_at"] = naive["collected_at"].dt.tz_localize(None)
    naive["resulted_at"] = naive["resulted_at"].dt.tz_localize(None)
    write_table(tmp_path, "lab", naive, "collected_at", file_name="part-legacy.parquet")
    got = read_table(tmp_path, c.LAB, DEFAULT, scope="window", window=NIGHT)
    assert got.clean["result_id"].tolist() == ["aware"]
    assert got.rejects[["row_key", "reason"]].values.tolist() == [["naive", "naive_timestamp"]]


def test_bad_timestamp_rows_count_once_in_the_night_of_their_partition(tmp_path):
    bad = pd.DataFrame([lab_row("x", collected_at="2026-11-28T12:00Z")])
    bad["collected_at"] = "not a time"
    write_table(tmp_path, "lab", pd.DataFrame([lab_row("ok28", collected_at="2026-11-28T12:00Z")]), "collected_at")
    (tmp_path / "lab" / "date=2026-11-28").mkdir(exist_ok=True)
    pq.write_table(pa.Table.from_pandas(bad, preserve_index=False), tmp_path / "lab" / "date=2026-11-28" / "p2.parquet")
    # The night of 29 Nov reads the 28th's partition as slack but does not count its bad row.
    assert read_table(tmp_path, c.LAB, DEFAULT, scope="window", window=NIGHT).rejects.empty
    day28 = (pd.Timestamp("2026-11-28T00:00Z"), pd.Timestamp("2026-11-29T00:00Z"))
    assert read_table(tmp_path, c.LAB, DEFAULT, scope="window", window=day28).rejects["reason"].tolist() == ["unparseable_timestamp"]


def test_duplicate_ids_across_files_identical_keeps_one_conflicting_rejects_all(tmp_path):
    write_table(tmp_path, "ecg", [ecg_row("same"), ecg_row("clash")], "acquired_at")
    write_table(tmp_path, "ecg", [ecg_row("same"), ecg_row("clash", qrs_ms=150.0)], "acquired_at", file_name="part-1.parquet")
    got = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert got.clean["ecg_id"].tolist() == ["same"]
    assert sorted(got.rejects["row_key"]) == ["clash", "clash", "same"]
    assert set(got.rejects["reason"]) == {"duplicate_id"} and got.rows_in == 4


def test_corrupt_parquet_file_is_an_error_naming_the_file(tmp_path):
    write_table(tmp_path, "ecg", [ecg_row()], "acquired_at")
    broken = tmp_path / "ecg" / "date=2026-11-29" / "part-9.parquet"
    broken.write_bytes(b"this is not parquet")
    with pytest.raises(LakeError, match="part-9.parquet"):
        read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)


def test_an_io_error_of_the_system_is_not_taken_for_bad_data(tmp_path, monkeypatch):
    """A mount that is briefly away (EIO) must propagate as OSError so the scheduler retries it;
    only a damaged file is a LakeError (bad data, no retry)."""
    import errno

    import cardiosieve.pipeline.load as load

    write_table(tmp_path, "ecg", [ecg_row()], "acquired_at")

    def flaky(*args, **kwargs):
        raise OSError(errno.EIO, "Input/output error")
    monkeypatch.setattr(load.pq, "read_schema", flaky)
    with pytest.raises(OSError) as caught:
        read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert not isinstance(caught.value, LakeError) and caught.value.errno == errno.EIO


def test_missing_table_folder_is_an_error_but_medication_is_optional(tmp_path):
    with pytest.raises(LakeError, match="ecg/"):
        read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert read_table(tmp_path, c.MEDICATION, DEFAULT, scope="window", window=NIGHT).rows_in == 0


def test_stage_load_reads_only_the_nights_patients_and_reconciles(tmp_path):
    lake = write_lake(tmp_path / "lake",
                      ecg=[ecg_row("E1", "P1"), ecg_row("Eold", "P1", "2026-06-01T10:00Z"),
                           ecg_row("Eother", "P9", "2026-06-01T10:00Z")],
                      labs=[lab_row("R1", "P1"), lab_row("R9", "P9"),
                            lab_row("Na", "P1", analyte=LOINC_SODIUM, value=140.0)],   # not read
                      patients=[patient_row("P1"), patient_row("P9")])
    got = stage_load(lake, tmp_path / "out", *NIGHT)
    t = got["tables"]
    assert t["ecg"]["accepted"] == 1 and t["ecg_history"]["accepted"] == 1
    assert t["lab"]["accepted"] == 1 and t["patient"]["accepted"] == 1
    assert t["ecg_lead"]["accepted"] == 12                 # the night's ECG's 12 leads
    for counts in t.values():
        assert counts["rows_in"] == counts["accepted"] + counts["rejected"]
    # After alignment, the chosen prior ECG's leads are read too (and only those).
    aligned = stage_align(tmp_path / "out", *NIGHT, lake=lake)
    assert aligned["with_prior_ecg"] == 1 and aligned["prior_lead_rows"] == 12


# ---------------------------------------------------------------------------------------------
# Rows outside their partition (pipeline/load.py docstring): rejected once, by the run of the
# partition's date; never accepted. ECG and lab partition slack: 1 day (contract Table).

def _text_times(rows: list[dict], column: str) -> pd.DataFrame:
    """The rows with their times as ISO 8601 text (the path where the scan cannot filter on time)."""
    df = pd.DataFrame(rows)
    df[column] = df[column].dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    return df


@pytest.mark.parametrize("as_text", [False, True], ids=["timestamp", "text"])
def test_a_row_misfiled_tonight_and_timed_five_days_ago_is_a_reject_of_tonights_run(tmp_path, as_text):
    rows = [ecg_row("ok"), ecg_row("early", acquired_at="2026-11-24T10:00:00Z")]
    write_partition(tmp_path, "ecg", "date=2026-11-29", _text_times(rows, "acquired_at") if as_text else rows)
    got = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert got.clean["ecg_id"].tolist() == ["ok"]
    assert got.rejects[["row_key", "reason", "column"]].values.tolist() == \
        [["early", "outside_partition", "acquired_at"]]
    # The night of its time neither accepts nor counts it: that night does not read the 29th.
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-24")).rows_in == 0


def test_a_row_timed_tonight_in_last_weeks_partition_is_rejected_by_last_weeks_run(tmp_path):
    write_partition(tmp_path, "ecg", "date=2026-11-22", [ecg_row("late", acquired_at="2026-11-29T10:00:00Z")])
    write_table(tmp_path, "ecg", [ecg_row("ok")], "acquired_at")
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT).clean["ecg_id"].tolist() == ["ok"]
    last_week = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-22"))
    assert last_week.clean.empty
    assert last_week.rejects[["row_key", "reason"]].values.tolist() == [["late", "outside_partition"]]


def test_the_slack_accepts_a_row_just_after_midnight_in_the_previous_days_partition(tmp_path):
    # A local-date exporter (UTC+1) files 00:30 UTC on the 29th under the 28th: inside the 28th's
    # range [27th, 30th) with one day of slack, so the 29th's night accepts it and the 28th's
    # night (which reads the same partition) neither accepts nor rejects it.
    write_partition(tmp_path, "ecg", "date=2026-11-28", [ecg_row("edge", acquired_at="2026-11-29T00:30:00Z")])
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT).clean["ecg_id"].tolist() == ["edge"]
    day28 = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-28"))
    assert day28.rows_in == 0
    # One day further (00:30 on the 30th, filed under the 28th) is beyond the slack.
    write_partition(tmp_path, "ecg", "date=2026-11-28", [ecg_row("far", acquired_at="2026-11-30T00:30:00Z")],
                    file_name="part-8.parquet")
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-28")) \
        .rejects["row_key"].tolist() == ["far"]
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-30")).rows_in == 0


def test_a_row_without_a_time_in_a_timestamp_column_is_rejected_not_dropped_by_the_scan(tmp_path):
    rows = pd.DataFrame([ecg_row("ok"), ecg_row("no-time")])
    rows.loc[1, "acquired_at"] = pd.NaT
    write_partition(tmp_path, "ecg", "date=2026-11-29", rows)
    got = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=NIGHT)
    assert got.rejects[["row_key", "reason"]].values.tolist() == [["no-time", "missing_value"]]
    assert read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=night_of("2026-11-28")).rows_in == 0


def test_a_context_read_told_the_night_counts_only_tonights_partitions_and_accepts_no_misfiled_row(tmp_path):
    # ECG history reaches back a year: a row filed on the 20th but timed the 25th lies in that
    # window, yet it belongs to the 20th's night (which rejected it); tonight's history read
    # must neither accept it nor count it again.
    write_partition(tmp_path, "ecg", "date=2026-11-20", [ecg_row("misfiled", acquired_at="2026-11-25T10:00:00Z"),
                                                         ecg_row("prior", acquired_at="2026-11-20T10:00:00Z")])
    history = read_table(tmp_path, c.ECG, DEFAULT, scope="window", night=NIGHT,
                         window=(NIGHT[0] - pd.Timedelta(days=365), NIGHT[0]))
    assert history.clean["ecg_id"].tolist() == ["prior"] and history.rejects.empty
    # Labs: the misfiled result in tonight's partition is tonight's reject; the one in the 27th's
    # partition (read for its window) is the 27th's.
    write_partition(tmp_path, "lab", "date=2026-11-29", [lab_row("R-tonight", collected_at="2026-11-20T09:00:00Z")])
    write_partition(tmp_path, "lab", "date=2026-11-27", [lab_row("R-27", collected_at="2026-11-21T09:00:00Z"),
                                                         lab_row("R-ok", collected_at="2026-11-28T09:00:00Z")])
    lab_window = (NIGHT[0] - pd.Timedelta(hours=96), NIGHT[1] + pd.Timedelta(hours=6))
    lab = read_table(tmp_path, c.LAB, DEFAULT, scope="window", window=lab_window, night=NIGHT)
    assert lab.clean["result_id"].tolist() == ["R-ok"]
    assert lab.rejects[["row_key", "reason"]].values.tolist() == [["R-tonight", "outside_partition"]]
    lab27 = read_table(tmp_path, c.LAB, DEFAULT, scope="window", night=night_of("2026-11-27"),
                       window=(pd.Timestamp("2026-11-23T00:00Z"), pd.Timestamp("2026-11-28T06:00Z")))
    assert lab27.rejects["row_key"].tolist() == ["R-27"]


def test_across_every_night_each_row_is_accepted_or_rejected_exactly_once(tmp_path):
    """No row vanishes: read night by night, every row of the lake comes out once."""
    write_table(tmp_path, "ecg", [ecg_row(f"E{d}", acquired_at=f"2026-11-{d:02d}T12:00:00Z") for d in range(20, 30)],
                "acquired_at")
    no_time = pd.DataFrame([ecg_row("no-time", acquired_at="2026-11-25T01:00:00Z")])
    no_time["acquired_at"] = pd.NaT
    write_partition(tmp_path, "ecg", "date=2026-11-25", no_time, file_name="part-7.parquet")
    write_partition(tmp_path, "ecg", "date=2026-11-29", [ecg_row("early", acquired_at="2026-11-24T10:00:00Z")])
    write_partition(tmp_path, "ecg", "date=2026-11-22", [ecg_row("late", acquired_at="2026-11-29T10:00:00Z"),
                                                         ecg_row("bad-qt", acquired_at="2026-11-22T10:00Z", qt_ms=5.0)])
    write_partition(tmp_path, "ecg", "date=2026-11-23", [ecg_row("edge", acquired_at="2026-11-24T00:30:00Z")])
    seen = []
    for day in pd.date_range("2026-11-15", "2026-12-05", tz="UTC"):
        got = read_table(tmp_path, c.ECG, DEFAULT, scope="night", window=(day, day + pd.Timedelta(days=1)))
        assert got.rows_in == len(got.clean) + len(got.rejects)
        seen += got.clean["ecg_id"].tolist() + got.rejects["row_key"].tolist()
    assert sorted(seen) == sorted([f"E{d}" for d in range(20, 30)] + ["no-time", "early", "late", "bad-qt", "edge"])
