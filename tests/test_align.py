"""Alignment rules at their edges, each stated in pipeline/align.py's docstring."""
import pandas as pd
import pytest

from cardiosieve.pipeline.align import align
from cardiosieve.pipeline.codes import LOINC_MAGNESIUM_MASS, LOINC_POTASSIUM_SERUM, LOINC_TROPONIN_I_HS
from cardiosieve.pipeline.config import settings_from_dict
from tests.lake_builders import ecg_row, lab_row, patient_row, ts

SETTINGS = settings_from_dict({"troponin": [{"code": LOINC_TROPONIN_I_HS, "url_ng_l": 26.0}],
                               "drugs": {"qt_prolonging": ["haloperidol", "ondansetron"],
                                         "loop_diuretic": ["furosemide"]}})
AT = "2026-11-29T10:00:00Z"


def run(ecg=None, labs=(), history=None, patients=None, medication=None):
    ecg = pd.DataFrame(ecg or [ecg_row(acquired_at=AT)])
    history = ecg if history is None else pd.concat([ecg, pd.DataFrame(history)], ignore_index=True)
    labs = pd.DataFrame(list(labs) or [lab_row("none", patient_id="nobody")])
    patients = pd.DataFrame(patients or [patient_row()])
    patients["birth_date"] = pd.to_datetime(patients["birth_date"]).dt.tz_localize("UTC")
    return align(ecg, history, labs, patients, None if medication is None else pd.DataFrame(medication), SETTINGS)


@pytest.mark.parametrize("collected, found", [
    ("2026-11-28T10:00:00Z", True),    # exactly 24 h before: inside (edge included)
    ("2026-11-28T09:59:00Z", False),   # 24 h 1 min before: outside
    ("2026-11-29T16:00:00Z", True),    # exactly 6 h after: inside
    ("2026-11-29T16:01:00Z", False),   # 6 h 1 min after: outside
])
def test_potassium_window_edges(collected, found):
    got = run(labs=[lab_row("R", collected_at=collected, value=5.0)])
    assert got["k_mmol_l"].notna().iloc[0] == found


def test_closest_wins_and_equal_distance_prefers_before():
    got = run(labs=[lab_row("before", collected_at="2026-11-29T08:00:00Z", value=5.0),
                    lab_row("after", collected_at="2026-11-29T12:00:00Z", value=6.0),
                    lab_row("far", collected_at="2026-11-28T12:00:00Z", value=7.0)])
    assert got["k_result_id"].iloc[0] == "before" and got["k_offset_min"].iloc[0] == -120
    got = run(labs=[lab_row("before", collected_at="2026-11-29T07:00:00Z", value=5.0),
                    lab_row("after", collected_at="2026-11-29T11:00:00Z", value=6.0)])
    assert got["k_result_id"].iloc[0] == "after" and got["k_offset_min"].iloc[0] == 60


def test_potassium_trend_uses_the_previous_result_within_72_hours():
    got = run(labs=[lab_row("now", collected_at="2026-11-29T09:00:00Z", value=6.8),
                    lab_row("prev", collected_at="2026-11-27T09:00:00Z", value=5.1),
                    lab_row("old", collected_at="2026-11-20T09:00:00Z", value=4.0)])
    assert got[["k_mmol_l", "k_prev_mmol_l"]].iloc[0].tolist() == [6.8, 5.1]
    assert got["k_change_mmol_l"].iloc[0] == pytest.approx(1.7)
    assert got["k_prev_offset_min"].iloc[0] == -(2 * 24 * 60 + 60)


def test_hemolysis_flag_travels_with_the_chosen_specimen():
    got = run(labs=[lab_row("h", collected_at="2026-11-29T09:30:00Z", value=6.9, hemolyzed=True)])
    assert bool(got["k_hemolyzed"].iloc[0]) is True


@pytest.mark.parametrize("prior_at, expected", [
    ("2026-11-29T09:00:00Z", "Eprior"),    # exactly 1 h earlier: a baseline
    ("2026-11-29T09:01:00Z", None),        # 59 min earlier: same encounter, not a baseline
    ("2025-11-29T10:00:00Z", "Eprior"),    # exactly 365 days earlier: inside
    ("2025-11-29T09:59:00Z", None),        # 365 days and a minute: outside
])
def test_prior_ecg_window(prior_at, expected):
    got = run(history=[ecg_row("Eprior", acquired_at=prior_at, qrs_ms=88.0)])
    value = got["prior_ecg_id"].iloc[0]
    assert (None if pd.isna(value) else value) == expected


def test_age_in_whole_years_and_sex():
    got = run(patients=[patient_row(sex="M", birth_date="1958-11-30")])
    assert got[["sex", "age_years"]].iloc[0].tolist() == ["M", 67.0]    # birthday is tomorrow
    got = run(patients=[patient_row(sex="M", birth_date="1958-11-29")])
    assert got["age_years"].iloc[0] == 68.0                            # birthday today


def test_troponin_ratio_to_assay_limit_and_rise():
    got = run(labs=[lab_row("t1", collected_at="2026-11-29T09:00:00Z", analyte=LOINC_TROPONIN_I_HS, value=30.0, unit="ng/L"),
                    lab_row("t2", collected_at="2026-11-29T13:00:00Z", analyte=LOINC_TROPONIN_I_HS, value=78.0, unit="ng/L")])
    row = got.iloc[0]
    assert row["trop_ng_l"] == 30.0 and row["trop_n"] == 2
    assert row["trop_max_ratio"] == pytest.approx(3.0) and row["trop_delta_ng_l"] == 48.0


def test_medication_in_the_24_hours_before_the_ecg_by_site_class():
    meds = [dict(patient_id="P1", administered_at=ts("2026-11-29T02:00:00Z"), drug="Haloperidol"),
            dict(patient_id="P1", administered_at=ts("2026-11-28T10:00:00Z"), drug="ondansetron"),   # exactly 24 h
            dict(patient_id="P1", administered_at=ts("2026-11-28T09:00:00Z"), drug="furosemide"),    # 25 h: outside
            dict(patient_id="P1", administered_at=ts("2026-11-29T11:00:00Z"), drug="haloperidol")]   # after the ECG
    got = run(medication=meds).iloc[0]
    assert got["qt_drug_count_24h"] == 2 and not got["loop_diuretic_24h"]


def test_without_a_medication_table_drug_exposure_is_unknown_not_false():
    got = run().iloc[0]
    assert pd.isna(got["qt_drug_count_24h"]) and pd.isna(got["loop_diuretic_24h"])


def test_missing_patient_keeps_the_ecg_with_unknown_age_and_sex():
    got = run(ecg=[ecg_row(patient_id="ghost", acquired_at=AT)])
    assert len(got) == 1 and pd.isna(got["sex"].iloc[0]) and pd.isna(got["age_years"].iloc[0])


# ---------------------------------------------------------------------------------------------
# Rejected potassium (k_rejected_reason): "measured but rejected" is not "none measured".

def rejected(result_id, collected_at, reason, patient_id="P1", analyte=LOINC_POTASSIUM_SERUM):
    return dict(result_id=result_id, patient_id=patient_id, collected_at=ts(collected_at) if collected_at else pd.NaT,
                analyte=analyte, reason=reason)


def run_with_rejects(labs=(), rejects=(), ecg=None):
    ecg = pd.DataFrame(ecg or [ecg_row(acquired_at=AT)])
    labs = pd.DataFrame(list(labs) or [lab_row("none", patient_id="nobody")])
    patients = pd.DataFrame([patient_row()])
    patients["birth_date"] = pd.to_datetime(patients["birth_date"]).dt.tz_localize("UTC")
    lab_rejects = pd.DataFrame(list(rejects)) if rejects else None
    return align(ecg, ecg, labs, patients, None, SETTINGS, lab_rejects=lab_rejects)


@pytest.mark.parametrize("collected, found", [
    ("2026-11-28T10:00:00Z", True),    # exactly lab_before_h (24 h) before: inside, as for accepted labs
    ("2026-11-28T09:59:00Z", False),   # a minute more: outside
    ("2026-11-29T16:00:00Z", True),    # exactly lab_after_h (6 h) after: inside
    ("2026-11-29T16:01:00Z", False),   # a minute more: outside
])
def test_rejected_potassium_window_edges_are_the_lab_window(collected, found):
    got = run_with_rejects(rejects=[rejected("R", collected, "quality:lab_potassium_plausible")])
    value = got["k_rejected_reason"].iloc[0]
    assert (None if pd.isna(value) else value) == ("quality:lab_potassium_plausible" if found else None)
    assert pd.isna(got["k_mmol_l"].iloc[0])


def test_the_latest_rejected_potassium_gives_the_reason_and_ties_go_to_the_greatest_id():
    got = run_with_rejects(rejects=[rejected("a", "2026-11-29T08:00:00Z", "impossible_value"),
                                    rejected("b", "2026-11-29T12:00:00Z", "quality:lab_potassium_plausible"),
                                    rejected("c", "2026-11-29T12:00:00Z", "unknown_unit")])
    assert got["k_rejected_reason"].iloc[0] == "unknown_unit"


def test_a_rejected_potassium_is_ignored_when_one_was_accepted():
    got = run_with_rejects(labs=[lab_row("ok", collected_at="2026-11-29T09:00:00Z", value=5.0)],
                           rejects=[rejected("bad", "2026-11-29T09:30:00Z", "impossible_value")])
    assert got["k_mmol_l"].iloc[0] == 5.0 and pd.isna(got["k_rejected_reason"].iloc[0])


def test_rejects_of_other_analytes_patients_or_unplaceable_rows_do_not_count():
    got = run_with_rejects(rejects=[
        rejected("mg", "2026-11-29T09:00:00Z", "impossible_value", analyte=LOINC_MAGNESIUM_MASS),
        rejected("other", "2026-11-29T09:00:00Z", "impossible_value", patient_id="P2"),  # another patient
        rejected("no-time", None, "unparseable_timestamp"),                              # cannot be placed
    ])
    assert pd.isna(got["k_rejected_reason"].iloc[0])


def test_without_rejects_the_column_is_there_and_null():
    got = run()
    assert "k_rejected_reason" in got.columns and got["k_rejected_reason"].isna().all()
