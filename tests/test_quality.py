"""Data-quality gate: each suite catches its planted rows, criticals stop the run, warnings do
not, the row-count band, ECGs missing a lead, and no identifier or value leaks out.

Frames are contract-typed (as the loader hands them over) and built here, dull by default: each
test plants only the rows it is about. Ranges come from pipeline/quality.py ("common practice"
plausibility limits, physiology) and the 5 % critical limit is the gate's local choice.
"""
import json
import logging
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.codes import LOINC_CALCIUM_MASS, LOINC_MAGNESIUM_MASS, LOINC_POTASSIUM_SERUM, LOINC_SODIUM
from cardiosieve.pipeline.quality import (CHECK_COLUMNS, QualityGateError, QualitySettings, build_checks, enforce, ge_context,
                              row_count_band, run_quality, run_suite, write_report)

RUN_END = pd.Timestamp("2026-11-30T02:00:00Z")
T_ECG = pd.Timestamp("2026-11-29T10:00:00Z")


# -- builders ---------------------------------------------------------------------------------

def _str(values):
    return pd.array(values, dtype="str")


def _utc(values):
    return pd.Series(pd.to_datetime(values, utc=True)).dt.as_unit("us")


def ecg_frame(n=100, **over):
    """n dull ECGs (HR 60, QT 400, QRS 90 ms), ids E000.., patients P000.."""
    df = pd.DataFrame({
        "ecg_id": _str([f"E{i:03d}" for i in range(n)]),
        "patient_id": _str([f"P{i:03d}" for i in range(n)]),
        "acquired_at": _utc([T_ECG + pd.Timedelta(minutes=i) for i in range(n)]),
        "heart_rate_bpm": 60.0, "rr_ms": 1000.0, "pr_ms": 160.0, "qrs_ms": 90.0, "qt_ms": 400.0,
        "p_axis_deg": 50.0, "qrs_axis_deg": 40.0, "t_axis_deg": 40.0,
        "paced": pd.array([False] * n, dtype="boolean"), "location": _str(["Ward 2"] * n)})
    for col, value in over.items():
        df[col] = value
    return df


def lead_frame(ecg_ids, leads=c.STANDARD_LEADS):
    ids = np.repeat(np.asarray(ecg_ids, dtype=object), len(leads))
    n = len(ids)
    return pd.DataFrame({"ecg_id": _str(ids), "lead": _str(np.tile(leads, len(ecg_ids))),
                         "p_amp_uv": np.full(n, 100.0), "r_amp_uv": np.full(n, 800.0),
                         "s_amp_uv": np.full(n, -300.0), "st_j_uv": np.full(n, 0.0),
                         "t_amp_uv": np.full(n, 250.0)})


def lab_frame(n=100, analyte=LOINC_POTASSIUM_SERUM, value=4.2, unit="mmol/L"):
    collected = _utc([T_ECG - pd.Timedelta(minutes=i) for i in range(n)])
    return pd.DataFrame({"result_id": _str([f"R{i:03d}" for i in range(n)]),
                         "patient_id": _str([f"P{i:03d}" for i in range(n)]),
                         "collected_at": collected, "resulted_at": collected + pd.Timedelta(hours=1),
                         "analyte": _str([analyte] * n), "value": np.full(n, value), "unit": _str([unit] * n),
                         "hemolyzed": pd.array([False] * n, dtype="boolean")})


def patient_frame(n=100):
    return pd.DataFrame({"patient_id": _str([f"P{i:03d}" for i in range(n)]),
                         "sex": _str(["F", "M"] * (n // 2) + ["F"] * (n % 2)),
                         "birth_date": _utc(["1960-05-01"] * n)})


def medication_frame(n=100):
    return pd.DataFrame({"patient_id": _str([f"P{i:03d}" for i in range(n)]),
                         "administered_at": _utc([T_ECG - pd.Timedelta(hours=2)] * n),
                         "drug": _str(["furosemide"] * n)})


def night(n=100):
    ecg = ecg_frame(n)
    return {"ecg": ecg, "ecg_lead": lead_frame(ecg["ecg_id"]), "lab": lab_frame(n), "patient": patient_frame(n)}


def put(df, row, col, value):
    """Copy of df with one cell set (the frames are shared by nobody, but keep tests explicit)."""
    df = df.copy()
    df.loc[row, col] = value
    return df


def rejected(result, table):
    """{row_key: set of check names} of the rejects for table."""
    rej = result.rejects[result.rejects["table"] == table]
    out = {}
    for key, reason in zip(rej["row_key"], rej["reason"]):
        out.setdefault(key, set()).add(reason.removeprefix("quality:"))
    return out


def check(result, name):
    row = result.checks[result.checks["check"] == name]
    assert len(row) == 1, name
    return row.iloc[0]


# -- a clean night ----------------------------------------------------------------------------

def test_clean_night_passes_every_check_and_keeps_every_row():
    tables = night()
    result = run_quality(tables, RUN_END)
    assert result.critical_failures == [] and result.rejects.empty and result.flagged.empty
    assert list(result.checks.columns) == CHECK_COLUMNS
    assert result.checks["passed"].all()
    for name, df in tables.items():
        assert len(result.clean[name]) == len(df)
    enforce(result)   # no exception


def test_inputs_are_left_unchanged():
    tables = night()
    tables["ecg"] = put(tables["ecg"], 3, "qt_ms", 750.0)
    before = {k: v.copy() for k, v in tables.items()}
    run_quality(tables, RUN_END)
    for name in tables:
        pd.testing.assert_frame_equal(tables[name], before[name])


# -- each suite catches its planted rows ----------------------------------------------------

def test_ecg_suite_rejects_each_planted_row_with_its_check():
    # Ids, keys and impossible values are the contract's (tests/test_normalise.py): none here.
    ecg = ecg_frame(100)
    ecg.loc[5, "acquired_at"] = RUN_END + pd.Timedelta(hours=1)        # after the run's end
    ecg.loc[6, "acquired_at"] = pd.Timestamp("1989-12-31", tz="UTC")   # before the 1990 floor
    ecg.loc[7, "heart_rate_bpm"] = 310.0                               # HR 20-300 (common practice)
    ecg.loc[8, "rr_ms"] = 150.0                                        # RR 200-3000 = HR 300-20
    ecg.loc[9, "pr_ms"] = 520.0                                        # PR 60-500
    ecg.loc[10, "qrs_ms"] = 30.0                                       # QRS 40-250
    ecg.loc[11, "qt_ms"] = 720.0                                       # QT 200-700
    ecg.loc[12, ["qrs_ms", "qt_ms"]] = [240.0, 230.0]                  # QT shorter than QRS
    tables = {"ecg": ecg, "ecg_lead": lead_frame(ecg["ecg_id"].dropna().unique())}
    result = run_quality(tables, RUN_END)

    assert rejected(result, "ecg") == {
        "E005": {"ecg_acquired_at_not_future"},
        "E006": {"ecg_acquired_at_after_floor"},
        "E007": {"ecg_heart_rate_bpm_plausible"},
        "E008": {"ecg_rr_ms_plausible"},
        "E009": {"ecg_pr_ms_plausible"},
        "E010": {"ecg_qrs_ms_plausible"},
        "E011": {"ecg_qt_ms_plausible"},
        "E012": {"ecg_qt_longer_than_qrs"},
    }
    assert len(result.clean["ecg"]) == 100 - 8
    assert result.critical_failures == []             # each check fails 1 % of 100 rows
    assert set(result.rejects["scope"]) == {"night"}
    assert set(result.rejects.columns) == set(c.REJECT_COLUMNS)


@pytest.mark.parametrize("column, low, high", [
    ("heart_rate_bpm", 20.0, 300.0), ("qrs_ms", 40.0, 250.0), ("qt_ms", 200.0, 700.0), ("pr_ms", 60.0, 500.0),
])   # common practice plausibility ranges (physiology), both ends inclusive
def test_ecg_range_boundaries_are_inclusive_and_missing_is_not_a_failure(column, low, high):
    ecg = ecg_frame(100, qrs_ms=40.0 if column != "qrs_ms" else 90.0)   # keep QT > QRS at all values
    ecg.loc[0:5, column] = [low - 0.1, low, high, high + 0.1, np.nan, (low + high) / 2]
    if column in ("heart_rate_bpm",):
        ecg["rr_ms"] = 600.0                                             # keep RR inside its range
    if column == "qrs_ms":
        ecg["qt_ms"] = 400.0
        ecg.loc[2:3, "qt_ms"] = 300.0                                    # QRS 250 < QT 300
    result = run_quality({"ecg": ecg}, RUN_END)
    assert set(rejected(result, "ecg")) == {"E000", "E003"}
    assert check(result, f"ecg_{column}_plausible")["rows_failed"] == 2


def test_lead_suite_rejects_implausible_amplitudes():
    # Lead names and (ecg_id, lead) duplicates are the contract's (unknown_lead, duplicate_id).
    ecg = ecg_frame(100)
    leads = lead_frame(ecg["ecg_id"])
    extra = lead_frame(["E001"], leads=("V4R",))                       # a right-sided lead is checked too
    extra["st_j_uv"] = 2500.0
    leads = pd.concat([leads, extra], ignore_index=True)
    leads.loc[(leads["ecg_id"] == "E004") & (leads["lead"] == "V2"), "st_j_uv"] = 2100.0   # > 2000 uV: the gate's local, generous limit
    leads.loc[(leads["ecg_id"] == "E005") & (leads["lead"] == "V3"), "r_amp_uv"] = 7100.0   # > 7000 uV: local choice
    result = run_quality({"ecg": ecg, "ecg_lead": leads}, RUN_END)
    assert rejected(result, "ecg_lead") == {
        "E001|V4R": {"ecg_lead_st_j_uv_plausible"},
        "E004|V2": {"ecg_lead_st_j_uv_plausible"},
        "E005|V3": {"ecg_lead_r_amp_uv_plausible"},
    }
    assert len(result.clean["ecg_lead"]) == len(leads) - 3
    assert result.critical_failures == []


def test_lab_suite_checks_ranges_and_times():
    # Codes in scope, units and result ids are the contract's (the loader reads configured codes
    # only, converts units or rejects them, and rejects conflicting duplicates).
    lab = pd.concat([lab_frame(60, LOINC_POTASSIUM_SERUM, 4.2), lab_frame(20, LOINC_MAGNESIUM_MASS, 0.8),
                     lab_frame(20, LOINC_CALCIUM_MASS, 2.3)],
                    ignore_index=True)
    lab["result_id"] = _str([f"R{i:03d}" for i in range(len(lab))])
    lab.loc[2, "value"] = 10.5                             # K 1.5-10 mmol/L (common practice)
    lab.loc[3, "value"] = 1.4
    lab.loc[4, "value"] = 10.0                             # at the limit: kept
    lab.loc[60, "value"] = 3.1                             # Mg 0.2-3 mmol/L
    lab.loc[80, "value"] = 0.9                             # Ca 1.0-4.0 mmol/L
    lab.loc[81, "value"] = 4.0                             # at the limit: kept
    lab.loc[5, "collected_at"] = RUN_END + pd.Timedelta(hours=5)        # inside the 6 h lab look-ahead (default lab_after_h)
    lab.loc[5, "resulted_at"] = RUN_END + pd.Timedelta(hours=6)
    lab.loc[6, "collected_at"] = RUN_END + pd.Timedelta(hours=7)        # beyond it
    lab.loc[6, "resulted_at"] = RUN_END + pd.Timedelta(hours=8)
    lab.loc[7, "resulted_at"] = lab.loc[7, "collected_at"] - pd.Timedelta(minutes=1)
    lab.loc[8, "resulted_at"] = pd.NaT                                   # not yet resulted: fine
    result = run_quality({"lab": lab}, RUN_END)
    assert rejected(result, "lab") == {
        "R002": {"lab_potassium_plausible"},
        "R003": {"lab_potassium_plausible"},
        "R060": {"lab_magnesium_plausible"},
        "R080": {"lab_calcium_plausible"},
        "R006": {"lab_collected_at_not_future"},
        "R007": {"lab_resulted_not_before_collected"},
    }
    assert check(result, "lab_potassium_plausible")["rows_checked"] == 60   # the K rows only (row condition)
    assert result.critical_failures == []


def test_patient_and_medication_suites():
    patient = patient_frame(50)
    patient.loc[1, "sex"] = np.nan                          # unknown sex is allowed (screens say so)
    patient.loc[2, "birth_date"] = pd.Timestamp("1899-12-31", tz="UTC")
    patient.loc[3, "birth_date"] = RUN_END + pd.Timedelta(days=1)
    med = medication_frame(50)
    med.loc[1, "administered_at"] = RUN_END + pd.Timedelta(hours=1)
    result = run_quality({"patient": patient, "medication": med}, RUN_END)
    assert rejected(result, "patient") == {
        "P002": {"patient_birth_date_after_floor"}, "P003": {"patient_birth_date_not_future"}}
    # The contract gives medication no key, so its rejects carry an empty row_key, as the loader's do.
    assert rejected(result, "medication") == {"": {"medication_administered_at_not_future"}}
    assert len(result.clean["medication"]) == 49
    assert result.critical_failures == []


def test_medication_is_optional_and_unknown_tables_pass_through():
    other = pd.DataFrame({"x": [1, 2]})
    result = run_quality({**night(10), "medication": None, "other": other}, RUN_END)
    assert not result.checks["table"].eq("medication").any()
    assert result.clean["other"] is other


# -- time: the run's end, never the wall clock -----------------------------------------------

def test_future_means_after_the_run_end_plus_15_minutes_not_the_wall_clock():
    run_end = pd.Timestamp("2041-01-01T02:00:00Z")           # decades ahead of any wall clock
    ecg = ecg_frame(100, acquired_at=_utc([run_end - pd.Timedelta(hours=3)] * 100))
    ecg.loc[0, "acquired_at"] = run_end + pd.Timedelta(minutes=14)   # within the 15 min tolerance (local choice)
    ecg.loc[1, "acquired_at"] = run_end + pd.Timedelta(minutes=16)
    result = run_quality({"ecg": ecg}, run_end)
    assert rejected(result, "ecg") == {"E001": {"ecg_acquired_at_not_future"}}


def test_naive_run_end_is_refused():
    with pytest.raises(ValueError, match="tz-aware"):
        run_quality(night(5), pd.Timestamp("2026-11-30T02:00:00"))


# -- severity: critical stops, warnings go on ------------------------------------------------

def test_a_few_bad_rows_are_a_warning_the_run_goes_on():
    ecg = ecg_frame(100)
    ecg.loc[0:4, "qt_ms"] = 710.0              # 5 of 100 = 5 %: at, not above, the 5 % limit
    result = run_quality({"ecg": ecg}, RUN_END)
    row = check(result, "ecg_qt_ms_plausible")
    assert (row["severity"], bool(row["passed"]), row["rows_failed"], row["pct_failed"]) == ("warning", False, 5, 5.0)
    assert result.critical_failures == []
    enforce(result)
    assert len(result.clean["ecg"]) == 95


def test_many_bad_rows_are_critical_and_enforce_names_table_check_and_count():
    ecg = ecg_frame(100)
    ecg.loc[0:5, "qt_ms"] = 0.71               # 6 of 100 in seconds: a unit mix-up, 6 % > 5 %
    result = run_quality({"ecg": ecg}, RUN_END)
    assert check(result, "ecg_qt_ms_plausible")["severity"] == "critical"
    # The same six rows also have a QT shorter than their QRS: two critical checks, one line each.
    assert len(result.critical_failures) == 2
    message = next(m for m in result.critical_failures if "ecg_qt_ms_plausible" in m)
    for part in ("table ecg", "ecg_qt_ms_plausible", "ExpectColumnValuesToBeBetween", "6 of 100 rows"):
        assert part in message
    with pytest.raises(QualityGateError) as err:
        enforce(result)
    assert err.value.failures == result.critical_failures and "6 of 100 rows" in str(err.value)


@pytest.mark.parametrize("rows_in, rejected, severity, passed", [
    (30, 30, "critical", False),      # every id empty: the contract rejected the whole night
    (100, 5, "warning", True),        # 5 %: at, not above, the limit (the rejects are listed)
    (100, 6, "critical", False),
    (10, 10, "warning", False),       # under 20 rows tonight: too few to judge, a warning
    (100, 0, "warning", True),
])
def test_a_night_the_contract_mostly_rejected_is_critical(rows_in, rejected, severity, passed):
    result = run_quality({"ecg": ecg_frame(rows_in - rejected)}, RUN_END, contract_rejects={"ecg": (rows_in, rejected)})
    row = check(result, "ecg_contract_rejects")
    assert (row["severity"], bool(row["passed"]), row["rows_failed"], row["rows_checked"]) == \
        (severity, passed, rejected, rows_in)
    assert any("ecg_contract_rejects" in m for m in result.critical_failures) == (severity == "critical" and not passed)


def test_site_may_make_a_check_warning_only():
    lab = lab_frame(30)
    lab.loc[0:9, "value"] = 10.5                # a third of the potassium values above 10 mmol/L
    qs = QualitySettings(critical_above_pct_by_check={"lab_potassium_plausible": None})
    result = run_quality({"lab": lab}, RUN_END, settings=qs)
    assert result.critical_failures == [] and check(result, "lab_potassium_plausible")["severity"] == "warning"
    assert len(result.clean["lab"]) == 20


# -- row counts against the trailing nights --------------------------------------------------

def test_row_count_band_is_median_plus_minus_scaled_mad_with_a_25_percent_floor():
    # Median 100.5; MAD 1.5 -> 3.5 / 0.6745 * 1.5 = 7.78 (Iglewicz & Hoaglin modified z 3.5, memory);
    # the 25 % floor 25.125 is wider, so the band is 75.375-125.625. The 500 night does not widen it.
    low, high = row_count_band([100, 102, 98, 101, 99, 500], QualitySettings())
    assert low == pytest.approx(75.375) and high == pytest.approx(125.625)


def test_row_count_band_uses_mad_when_nights_vary_widely():
    # Median 300, MAD 100 -> 3.5 / 0.6745 * 100 = 518.9: wider than the 25 % floor (75).
    low, high = row_count_band([100, 200, 300, 400, 500], QualitySettings())
    assert low == 0.0 and high == pytest.approx(300 + 518.90, abs=0.01)


@pytest.mark.parametrize("tonight, passed, word", [(100, True, "within band"), (60, False, "drop"),
                                                    (140, False, "surge")])
def test_row_count_outside_the_band_warns_and_never_stops_the_run(tonight, passed, word):
    tables = {"ecg": ecg_frame(tonight)}
    result = run_quality(tables, RUN_END, trailing_counts={"ecg": [100] * 7})   # band 75-125
    row = check(result, "ecg_row_count_in_band")
    assert bool(row["passed"]) is passed and row["severity"] == "warning" and word in row["detail"]
    assert result.critical_failures == []


def test_tonight_count_may_be_given_for_a_table_loaded_over_a_longer_window():
    # 400 lab rows cover the look-back window; tonight's own count, 100, is inside the band 75-125.
    result = run_quality({"lab": lab_frame(400)}, RUN_END, trailing_counts={"lab": [100] * 7},
                         tonight_counts={"lab": 100})
    assert bool(check(result, "lab_row_count_in_band")["passed"]) is True
    assert check(result, "lab_row_count_in_band")["rows_checked"] == 100


def test_row_count_with_too_few_nights_is_not_evaluable_not_passed():
    result = run_quality({"ecg": ecg_frame(10)}, RUN_END, trailing_counts={"ecg": [100, 100]})
    row = check(result, "ecg_row_count_in_band")
    assert row["passed"] is pd.NA and "not evaluable" in row["detail"]


# -- every ECG with its 12 standard leads ----------------------------------------------------

def test_ecg_missing_a_standard_lead_is_flagged_and_kept():
    ecg = ecg_frame(100)
    leads = lead_frame(ecg["ecg_id"])
    leads = leads[~((leads["ecg_id"] == "E001") & (leads["lead"] == "V4"))]          # 11 leads
    leads = leads[~((leads["ecg_id"] == "E002") & leads["lead"].isin(["I", "II"]))]  # 10 leads
    extra = lead_frame(["E003"], leads=c.RIGHT_LEADS)                                 # 12 + 2 extra: complete
    bad = (leads["ecg_id"] == "E004") & (leads["lead"] == "V1")
    leads.loc[bad, "st_j_uv"] = 2500.0          # rejected lead row: E004 is left with 11 usable leads
    result = run_quality({"ecg": ecg, "ecg_lead": pd.concat([leads, extra])}, RUN_END)
    assert sorted(result.flagged["row_key"]) == ["E001", "E002", "E004"]
    assert set(result.flagged["check"]) == {"ecg_standard_leads_complete"}
    row = check(result, "ecg_standard_leads_complete")
    assert (row["rows_checked"], row["rows_failed"], row["severity"]) == (100, 3, "warning")
    assert len(result.clean["ecg"]) == 100      # kept: the QT and potassium screens still apply


def test_night_without_lead_rows_is_critical():
    # Every ECG lacks its leads: an export fault, 100 % > 5 %.
    ecg = ecg_frame(20)
    result = run_quality({"ecg": ecg, "ecg_lead": lead_frame([])}, RUN_END)
    assert any("ecg_standard_leads_complete" in m and "20 of 20" in m for m in result.critical_failures)


def test_no_lead_table_leaves_the_lead_check_not_evaluable():
    result = run_quality({"ecg": ecg_frame(5)}, RUN_END)
    assert check(result, "ecg_standard_leads_complete")["passed"] is pd.NA


# -- errors -----------------------------------------------------------------------------------

def test_a_crashing_expectation_raises_naming_the_check_not_passing():
    ecg = ecg_frame(10)
    ecg["acquired_at"] = ecg["acquired_at"].dt.tz_localize(None)     # naive: the contract forbids it
    with pytest.raises(RuntimeError, match="ecg_acquired_at_not_future"):
        run_quality({"ecg": ecg}, RUN_END)


def test_a_missing_column_is_the_contracts_business_and_raises():
    with pytest.raises(ValueError, match="lacks column"):
        run_quality({"lab": lab_frame(5).drop(columns="resulted_at")}, RUN_END)


# -- nothing from the rows reaches the report, the GE results or the logs --------------------

SECRET_PATIENT = "PT-SECRET-4711"
SECRET_ECG = "ECG-SECRET-0815"
SECRET_RESULT = "LAB-SECRET-9999"
SECRET_QT = 712.345          # out of range: rejected
SECRET_K = 10.987            # out of range: rejected


def _secret_night():
    tables = night(40)
    ecg = tables["ecg"]
    ecg.loc[0, ["ecg_id", "patient_id"]] = [SECRET_ECG, SECRET_PATIENT]
    ecg.loc[0, "qt_ms"] = SECRET_QT
    ecg.loc[1, "qt_ms"] = SECRET_QT                                    # a second implausible QT
    lab = tables["lab"]
    lab.loc[0, ["result_id", "patient_id", "value"]] = [SECRET_RESULT, SECRET_PATIENT, SECRET_K]
    tables["patient"].loc[0, "patient_id"] = SECRET_PATIENT
    tables["ecg_lead"] = tables["ecg_lead"][tables["ecg_lead"]["ecg_id"] != "E005"]   # a flagged ECG
    return tables


def test_no_identifier_or_value_reaches_report_ge_results_or_logs(tmp_path, caplog, capsys):
    secrets = [SECRET_PATIENT, SECRET_ECG, SECRET_RESULT, "E005", "712.3", "10.98"]
    with caplog.at_level(logging.DEBUG):
        result = run_quality(_secret_night(), RUN_END, trailing_counts={"ecg": [40] * 6})
        paths = write_report(result, tmp_path)
    # The rows were caught (so the secrets were in play) ...
    assert SECRET_ECG in set(result.rejects["row_key"]) and "E005" in set(result.flagged["row_key"])
    assert result.ge_results and all("unexpected_index_list" not in r for r in result.ge_results)
    # ... yet nothing that leaves the gate for people to read holds them.
    captured = capsys.readouterr()
    texts = {
        "quality.json": Path(paths["json"]).read_text(encoding="utf-8"),
        "quality.html": Path(paths["html"]).read_text(encoding="utf-8"),
        "ge_results": json.dumps(result.ge_results, default=str),
        "checks": result.checks.to_csv(),
        "critical_failures": "\n".join(result.critical_failures),
        "logs": caplog.text + "\n".join(str(r.args) for r in caplog.records),
        "stdout/stderr": captured.out + captured.err,
    }
    for where, text in texts.items():
        for secret in secrets:
            assert secret not in text, f"{secret!r} found in {where}"
    # The logs did say something, in counts.
    assert "quality: table ecg: 40 rows in, 2 rejected" in caplog.text


def test_report_has_counts_percentages_and_the_privacy_sentence(tmp_path):
    result = run_quality(_secret_night(), RUN_END)
    paths = write_report(result, tmp_path)
    data = json.loads(Path(paths["json"]).read_text(encoding="utf-8"))
    # Rows 0 and 1 have a QT out of range: 2 of 40 rows, 5 %, not above it.
    assert data["tables"]["ecg"] == {"rows_in": 40, "rows_rejected": 2, "pct_rejected": 5.0, "rows_flagged": 1}
    assert "no patient identifiers" in data["privacy"]
    assert data["passed"] is True
    qt = next(k for k in data["checks"] if k["check"] == "ecg_qt_ms_plausible")
    assert (qt["rows_failed"], qt["pct_failed"], qt["severity"]) == (2, 5.0, "warning")
    page = Path(paths["html"]).read_text(encoding="utf-8")
    assert "no patient identifiers" in page and "ecg_qt_ms_plausible" in page


def test_ge_results_themselves_hold_no_values_and_summary_format_would_have():
    # GE's own result object, before the gate reduces it to counts: with NO_VALUES it names no
    # value or id; the same suite run with GE's default SUMMARY format does (the control shows
    # this test can fail).
    ecg = _secret_night()["ecg"].reset_index(drop=True)
    checks = [k for k in build_checks(QualitySettings(), RUN_END)["ecg"] if k.expectation != "pandas"]
    raw = run_suite(ge_context(), "ecg", ecg, checks)
    text = json.dumps(raw.describe_dict(), default=str) + str(raw)
    for secret in (SECRET_ECG, "712.345"):
        assert secret not in text
    assert raw.results[0].result.get("partial_unexpected_list") is None
    summary = str(run_suite(ge_context(), "ecg", ecg, checks, result_format="SUMMARY"))
    assert "712.345" in summary                    # the value itself, in GE's partial lists


# ---------------------------------------------------------------- missing feeds (stop by default)
def _feed_lake(tmp_path, n_ecg: int, lab_day: str):
    from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake

    pids = [f"P{i}" for i in range(n_ecg)]
    return write_lake(tmp_path / "lake",
                      ecg=[ecg_row(f"E{i}", p, acquired_at=f"2026-11-29T{8 + i % 12:02d}:00:00Z") for i, p in enumerate(pids)]
                      or [ecg_row("E0", "P0", acquired_at="2026-11-20T10:00:00Z")],
                      labs=[lab_row(f"R{i}", p, collected_at=f"{lab_day}T07:00:00Z", value=6.8) for i, p in enumerate(pids or ["P0"])],
                      patients=[patient_row(p) for p in (pids or ["P0"])])


def _run(tmp_path, lake, config_text: str = ""):
    from cardiosieve.pipeline.cli import main

    config = tmp_path / "site.toml"
    config.write_text(config_text, encoding="utf-8")
    return main(["run", "--lake", str(lake), "--out", str(tmp_path / "out"), "--config", str(config),
                 "--start", "2026-11-29", "--end", "2026-11-30"])


def test_ecgs_without_any_lab_row_stop_the_run_by_default(tmp_path, capsys):
    # 25 ECGs of patients whose potassium is on another day only: the lab feed for tonight is
    # missing. Without the gate the hyperkalaemia findings would silently fall back to "no
    # potassium measured" with exit 0.
    lake = _feed_lake(tmp_path, 25, lab_day="2026-11-01")
    assert _run(tmp_path, lake) == 2
    err = capsys.readouterr().err
    assert "lab_feed_present" in err and "P1" not in err
    assert not (tmp_path / "out" / "worklist.parquet").exists()


def test_a_site_may_lower_a_missing_feed_to_a_warning_that_the_summary_records(tmp_path):
    import json

    lake = _feed_lake(tmp_path, 25, lab_day="2026-11-01")
    assert _run(tmp_path, lake, '[quality]\nmissing_feed = "warning"\n') == 0
    report = json.loads((tmp_path / "out" / "quality.json").read_text())
    checks = {c["check"]: c for c in report["checks"]}
    assert checks["lab_feed_present"]["passed"] is False and checks["lab_feed_present"]["severity"] == "warning"


def test_a_small_night_without_labs_is_a_warning_not_a_stop(tmp_path):
    lake = _feed_lake(tmp_path, 3, lab_day="2026-11-01")
    assert _run(tmp_path, lake) == 0


def test_a_night_with_no_ecg_rows_stops_the_run(tmp_path, capsys):
    # Tonight's partition landed but holds no row (a night whose partition is missing altogether
    # stops earlier, at the landing check: tests/test_cli.py).
    import pandas as pd

    from tests.lake_builders import ecg_row, write_partition

    lake = _feed_lake(tmp_path, 0, lab_day="2026-11-20")
    write_partition(lake, "ecg", "date=2026-11-29", pd.DataFrame([ecg_row()]).iloc[0:0])
    assert _run(tmp_path, lake) == 2
    assert "ecg_feed_present" in capsys.readouterr().err


def test_with_labs_tonight_the_feed_checks_pass(tmp_path):
    lake = _feed_lake(tmp_path, 25, lab_day="2026-11-29")
    assert _run(tmp_path, lake) == 0


def _volume_lake(tmp_path, tonight_labs: int):
    from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake

    pids = [f"P{i}" for i in range(25)]
    earlier = [lab_row(f"H{d}-{i}", f"Q{i}", collected_at=f"2026-11-{d:02d}T09:00:00Z")
               for d in range(15, 29) for i in range(200)]          # 200 lab rows a night before
    tonight = [lab_row(f"R{i}", pids[i % 25], collected_at="2026-11-29T07:00:00Z") for i in range(tonight_labs)]
    return write_lake(tmp_path / "lake",
                      ecg=[ecg_row(f"E{i}", p, acquired_at=f"2026-11-29T{8 + i % 12:02d}:00:00Z") for i, p in enumerate(pids)],
                      labs=earlier + tonight, patients=[patient_row(p) for p in pids])


def test_a_lab_feed_far_under_its_recent_volume_stops_the_run(tmp_path, capsys):
    # 200 lab rows on each recent night, 25 tonight: the feed is likely incomplete, and the
    # hyperkalaemia screen would rank many ECGs without a potassium (lab_feed_volume).
    assert _run(tmp_path, _volume_lake(tmp_path, 25)) == 2
    assert "lab_feed_volume" in capsys.readouterr().err


def test_a_lab_feed_at_its_usual_volume_passes(tmp_path):
    assert _run(tmp_path, _volume_lake(tmp_path, 190)) == 0


# -- the run's own row checks against Great Expectations --------------------------------------

@pytest.mark.parametrize("seed", [1, 2, 3])
def test_the_row_checks_fail_exactly_the_rows_great_expectations_fails(seed):
    """own_counts (numpy, what the run acts on) and Great Expectations (the reference library)
    evaluate every catalogue expectation on random tables with missing values, duplicates,
    values on the range edges and rows outside a row condition: same rows checked, same failing
    positions, check by check."""
    rng = np.random.default_rng(seed)
    n = 400

    def maybe_missing(values, frac=0.1):
        s = pd.Series(values)
        s[rng.random(len(s)) < frac] = None
        return s

    ecg = ecg_frame(n)
    ecg["ecg_id"] = _str(maybe_missing(rng.choice([f"E{i}" for i in range(n - 30)], n)))
    ecg["patient_id"] = _str(maybe_missing(rng.choice(["P1", "P2", "P3"], n)))
    ecg["acquired_at"] = maybe_missing(rng.choice(
        _utc([RUN_END + pd.Timedelta(minutes=15), RUN_END + pd.Timedelta(minutes=16), pd.Timestamp("1989-12-31T23:59Z"),
              pd.Timestamp("1990-01-01T00:00Z"), T_ECG]).to_numpy(), n))
    ecg["acquired_at"] = pd.to_datetime(ecg["acquired_at"], utc=True).dt.as_unit("us")
    for col, (lo, hi) in QualitySettings().ecg_ranges.items():
        ecg[col] = maybe_missing(rng.choice([lo - 1, lo, (lo + hi) / 2, hi, hi + 0.5], n)).astype("float64")
    leads = lead_frame([f"E{i}" for i in range(n // 12)])
    leads["lead"] = _str(maybe_missing(rng.choice([*c.STANDARD_LEADS, "V4R", "lead?"], len(leads)), 0.05))
    leads["st_j_uv"] = rng.choice([-2000.0, -1999.0, 0.0, 2000.0, 2001.0, np.nan], len(leads))
    lab = lab_frame(n)
    lab["analyte"] = _str(maybe_missing(rng.choice([LOINC_POTASSIUM_SERUM, LOINC_MAGNESIUM_MASS, LOINC_SODIUM], n)))
    lab["value"] = maybe_missing(rng.choice([1.4, 1.5, 4.0, 10.0, 10.1, 0.19, 3.0], n)).astype("float64")
    lab["unit"] = _str(maybe_missing(rng.choice(["mmol/L", "mg/dL"], n)))
    lab["result_id"] = _str(maybe_missing(rng.choice([f"R{i}" for i in range(n - 40)], n)))
    lab["resulted_at"] = lab["collected_at"] + pd.to_timedelta(rng.choice([-1, 0, 1], n), unit="min")
    lab.loc[rng.random(n) < 0.1, "resulted_at"] = pd.NaT
    tables = {"ecg": ecg, "ecg_lead": leads, "lab": lab}
    catalogue = build_checks(QualitySettings(), RUN_END)
    ctx = ge_context()
    from cardiosieve.pipeline.quality import _validate, own_counts
    compared = 0
    for table, df in tables.items():
        checks = [k for k in catalogue[table] if k.expectation != "pandas"]
        ours = own_counts(table, df.reset_index(drop=True), checks)
        ge = _validate(ctx, table, df.reset_index(drop=True), checks)
        for chk in checks:
            assert ours[chk.name][0] == ge[chk.name][0], chk.name
            assert ours[chk.name][1].tolist() == ge[chk.name][1].tolist(), chk.name
            compared += bool(len(ours[chk.name][1]))
    assert compared >= 10          # most checks had failing rows to compare, not only passes


def test_a_disagreement_between_the_evaluators_is_a_critical_failure(monkeypatch):
    from cardiosieve.pipeline import quality
    real = quality._own_count
    monkeypatch.setattr(quality, "_own_count", lambda df, chk: (real(df, chk)[0], np.array([], dtype=np.int64))
                        if chk.name == "ecg_qt_ms_plausible" else real(df, chk))
    ecg = ecg_frame(100)
    ecg.loc[3, "qt_ms"] = 900.0
    result = run_quality({"ecg": ecg}, RUN_END)
    assert not check(result, "ecg_evaluators_agree")["passed"]
    assert any("ecg_evaluators_agree" in m and "ecg_qt_ms_plausible" in m for m in result.critical_failures)
    assert run_quality({"ecg": ecg}, RUN_END, evaluator="own").critical_failures == []


# ---------------------------------------------------------------- what the contract owns
def test_an_export_that_lost_every_patient_id_stops_the_run(tmp_path, capsys):
    # The contract rejects each ECG (missing_value); without the gate's count of those rejects
    # the night would pass as "25 ECGs, 0 screened" with exit 0 and no finding.
    from tests.lake_builders import write_table

    lake = _feed_lake(tmp_path, 25, lab_day="2026-11-29")
    ecg = pd.read_parquet(next((lake / "ecg").rglob("*.parquet")))
    ecg["patient_id"] = pd.array([None] * len(ecg), dtype="str")
    for f in (lake / "ecg").rglob("*.parquet"):
        f.unlink()
    write_table(lake, "ecg", ecg, "acquired_at")
    assert _run(tmp_path, lake) == 2
    err = capsys.readouterr().err
    assert "ecg_contract_rejects" in err and "25 of 25 rows" in err and "E1" not in err


def test_the_checks_the_gate_leaves_to_the_contract_are_rejected_by_the_loader(tmp_path):
    """Empty ids, conflicting duplicate keys, unknown lead names, sex codes and lab units: each
    is a contract reject with its reason before the gate sees the rows (docs/quality.md)."""
    from cardiosieve.pipeline.config import settings_from_dict
    from cardiosieve.pipeline.load import read_table
    from tests.lake_builders import ecg_row, lab_row, lead_rows, patient_row, write_lake

    lake = write_lake(
        tmp_path / "lake",
        ecg=[ecg_row("E1"), ecg_row("E2", patient_id=None), ecg_row("E3"), ecg_row("E3", qt_ms=420.0),
             ecg_row(None, "P9")],
        leads=lead_rows("E1") + lead_rows("E2", V1={"lead": "V10"}) + [lead_rows("E1")[0] | {"st_j_uv": 50.0}],
        labs=[lab_row("R1"), lab_row("R2", unit="mg/dL"), lab_row(None), lab_row("R4"), lab_row("R4", value=5.1)],
        patients=[patient_row("P1"), patient_row("P2", sex="U"), patient_row(None)])
    settings, window = settings_from_dict({}), (pd.Timestamp("2026-11-29T00:00Z"), pd.Timestamp("2026-11-30T00:00Z"))
    got = {t.name: read_table(lake, t, settings, scope="night", window=window if t.time_column else None)
           for t in (c.ECG, c.ECG_LEAD, c.LAB, c.PATIENT)}
    reasons = {name: sorted(set(zip(g.rejects["row_key"], g.rejects["reason"]))) for name, g in got.items()}
    assert reasons["ecg"] == [("", "missing_value"), ("E2", "missing_value"), ("E3", "duplicate_id")]
    assert reasons["ecg_lead"] == [("E1|I", "duplicate_id"), ("E2|V10", "unknown_lead")]
    assert reasons["lab"] == [("", "missing_value"), ("R2", "unknown_unit"), ("R4", "duplicate_id")]
    assert reasons["patient"] == [("", "missing_value"), ("P2", "impossible_value")]
    assert got["ecg"].clean["ecg_id"].tolist() == ["E1"] and got["lab"].clean["result_id"].tolist() == ["R1"]
