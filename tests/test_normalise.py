"""Contract parsing: units, timestamps and each reject reason, with counts that reconcile."""
import numpy as np
import pandas as pd
import pytest

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.codes import LOINC_CALCIUM_MASS, LOINC_MAGNESIUM_MASS, LOINC_POTASSIUM_SERUM
from cardiosieve.pipeline.config import settings_from_dict
from cardiosieve.pipeline.normalise import ContractError, normalise_table
from tests.lake_builders import ecg_row, lab_row, lead_rows

DEFAULT = settings_from_dict({})


def lab(values, units, analyte):
    return pd.DataFrame([lab_row(f"R{i}", value=v, unit=u, analyte=analyte) for i, (v, u) in enumerate(zip(values, units))])


# -- units ------------------------------------------------------------------------------------

def test_potassium_meq_per_litre_equals_mmol_per_litre():
    # K+ is monovalent, so 1 meq/L = 1 mmol/L (IUPAC definition of the equivalent; valence 1).
    got = normalise_table(lab([5.1, 5.1], ["meq/L", "mEq/L"], LOINC_POTASSIUM_SERUM), c.LAB, DEFAULT).clean
    assert got["value"].tolist() == [5.1, 5.1] and set(got["unit"]) == {"mmol/L"}


@pytest.mark.parametrize("mg_dl, expected_mmol_l", [
    (2.4305, 1.0),     # Mg molar mass 24.305 g/mol (IUPAC standard atomic weight): 24.305 mg/L = 1 mmol/L
    (1.7, 0.6994),     # 17 mg/L / 24.305 = 0.6994 mmol/L (hypomagnesaemia cut-off, docs/references.md, practice)
])
def test_magnesium_mg_per_dl_converts_by_molar_mass(mg_dl, expected_mmol_l):
    got = normalise_table(lab([mg_dl], ["mg/dL"], LOINC_MAGNESIUM_MASS), c.LAB, DEFAULT).clean
    assert got["value"].iloc[0] == pytest.approx(expected_mmol_l, abs=1e-4)


@pytest.mark.parametrize("mg_dl, expected_mmol_l", [
    (4.0078, 1.0),     # Ca molar mass 40.078 g/mol (IUPAC): 40.078 mg/L = 1 mmol/L
    (8.5, 2.1209),     # 85 mg/L / 40.078 = 2.1209 mmol/L (lower normal total calcium, practice)
])
def test_calcium_mg_per_dl_converts_by_molar_mass(mg_dl, expected_mmol_l):
    got = normalise_table(lab([mg_dl], ["mg/dL"], LOINC_CALCIUM_MASS), c.LAB, DEFAULT).clean
    assert got["value"].iloc[0] == pytest.approx(expected_mmol_l, abs=1e-4)


def test_divalent_meq_is_half_a_millimole():
    # Mg2+ and Ca2+ carry two charges: 1 mmol = 2 meq (definition of the equivalent).
    got = normalise_table(lab([1.6], ["meq/L"], LOINC_MAGNESIUM_MASS), c.LAB, DEFAULT).clean
    assert got["value"].iloc[0] == pytest.approx(0.8)


def test_qt_and_qrs_given_in_seconds_become_milliseconds():
    s = settings_from_dict({"units": {"ecg": {"qt_ms": "s", "qrs_ms": "s"}}})
    raw = pd.DataFrame([ecg_row(qt_ms=0.412, qrs_ms=0.096)])
    got = normalise_table(raw, c.ECG, s).clean
    assert got["qt_ms"].iloc[0] == pytest.approx(412) and got["qrs_ms"].iloc[0] == pytest.approx(96)


@pytest.mark.parametrize("unit, given, expected_uv", [("mV", 1.2, 1200.0), ("mm", 3.0, 300.0)])
def test_amplitudes_in_millivolts_or_millimetres_become_microvolts(unit, given, expected_uv):
    # Standard calibration 10 mm/mV: 1 mm = 0.1 mV = 100 uV (docs/references.md, practice).
    s = settings_from_dict({"units": {"ecg_lead": {"amplitude": unit}}})
    raw = pd.DataFrame(lead_rows())
    raw["t_amp_uv"] = given
    raw["r_amp_uv"], raw["s_amp_uv"], raw["p_amp_uv"], raw["st_j_uv"] = 0.5, -0.1, 0.05, 0.0
    got = normalise_table(raw, c.ECG_LEAD, s).clean
    assert got["t_amp_uv"].tolist() == pytest.approx([expected_uv] * 12)


def test_rr_is_derived_from_heart_rate_when_absent():
    raw = pd.DataFrame([ecg_row(heart_rate_bpm=75.0, rr_ms=np.nan)])
    assert normalise_table(raw, c.ECG, DEFAULT).clean["rr_ms"].iloc[0] == pytest.approx(800.0)   # 60000/75


# -- timestamps -------------------------------------------------------------------------------

def ecg_with_times(times):
    raw = pd.DataFrame([ecg_row(f"E{i}") for i in range(len(times))])
    raw["acquired_at"] = pd.Series(times, dtype=object)
    return raw


def test_string_timestamps_with_offsets_are_converted_to_utc():
    got = normalise_table(ecg_with_times(["2026-07-01T12:00:00+01:00", "2026-07-01T11:00:00Z"]), c.ECG, DEFAULT)
    assert got.rejects.empty
    assert set(got.clean["acquired_at"]) == {pd.Timestamp("2026-07-01T11:00Z")}


def test_naive_timestamps_are_rejected_without_a_site_time_zone():
    got = normalise_table(ecg_with_times(["2026-07-01T12:00:00", "2026-07-01T11:00:00Z", "yesterday"]), c.ECG, DEFAULT)
    assert sorted(got.rejects["reason"]) == ["naive_timestamp", "unparseable_timestamp"]
    assert len(got.clean) + len(got.rejects) == 3


def test_naive_timestamps_follow_the_site_zone_across_daylight_saving():
    # Europe/London: BST (UTC+1) in July, GMT in January; clocks went forward at 01:00 UTC on
    # 2026-03-29 and back at 01:00 UTC on 2026-10-25 (EU summer-time rule, Directive 2000/84/EC).
    s = settings_from_dict({"site": {"timezone": "Europe/London"}})
    raw = pd.DataFrame([ecg_row(f"E{i}") for i in range(4)])
    raw["acquired_at"] = pd.to_datetime(["2026-07-01 12:00", "2026-01-15 12:00",
                                         "2026-03-29 01:30",      # does not exist in London
                                         "2026-10-25 01:30"])     # happens twice in London
    got = normalise_table(raw, c.ECG, s)
    assert got.clean.set_index("ecg_id")["acquired_at"].to_dict() == {
        "E0": pd.Timestamp("2026-07-01T11:00Z"), "E1": pd.Timestamp("2026-01-15T12:00Z")}
    assert got.rejects.set_index("row_key")["reason"].to_dict() == {"E2": "naive_timestamp", "E3": "naive_timestamp"}


# -- rejects ----------------------------------------------------------------------------------

def test_each_bad_row_kind_is_rejected_with_reason_and_column():
    raw = pd.DataFrame([ecg_row("ok"), ecg_row("qrs0", qrs_ms=0.0), ecg_row("qrs900", qrs_ms=900.0),
                        ecg_row("nohr", heart_rate_bpm=np.nan), ecg_row(None)])
    got = normalise_table(raw, c.ECG, DEFAULT)
    by_key = got.rejects.set_index("row_key")[["reason", "column"]].T.to_dict("list")
    assert by_key == {"qrs0": ["impossible_value", "qrs_ms"], "qrs900": ["impossible_value", "qrs_ms"],
                      "nohr": ["missing_value", "heart_rate_bpm"], "": ["missing_value", "ecg_id"]}
    assert got.clean["ecg_id"].tolist() == ["ok"]


def test_numbers_stored_as_text_parse_and_garbage_is_wrong_type():
    raw = pd.DataFrame([ecg_row("a"), ecg_row("b")])
    raw["qrs_ms"] = ["96", "n/a"]
    got = normalise_table(raw, c.ECG, DEFAULT)
    assert got.clean["qrs_ms"].tolist() == [96.0]
    assert got.rejects[["row_key", "reason", "column"]].values.tolist() == [["b", "wrong_type", "qrs_ms"]]


def test_potassium_of_45_is_impossible_and_unknown_unit_is_rejected():
    got = normalise_table(lab([45.0, 4.0, 4.0], ["mmol/L", "%", "mmol/L"], LOINC_POTASSIUM_SERUM), c.LAB, DEFAULT)
    assert got.rejects[["row_key", "reason"]].values.tolist() == [["R0", "impossible_value"], ["R1", "unknown_unit"]]


def test_unknown_lead_names_and_signed_amplitudes_are_checked():
    raw = pd.DataFrame(lead_rows(V1={"lead": "V10"}, V2={"r_amp_uv": -5.0}, V3={"s_amp_uv": 40.0}))
    got = normalise_table(raw, c.ECG_LEAD, DEFAULT)
    assert sorted(got.rejects["reason"]) == ["impossible_value", "impossible_value", "unknown_lead"]
    assert len(got.clean) == 9


def test_required_column_missing_is_a_whole_table_error_naming_file_and_column():
    raw = pd.DataFrame([ecg_row()]).drop(columns="qt_ms")
    with pytest.raises(ContractError, match=r"ecg.*part-7\.parquet.*qt_ms"):
        normalise_table(raw, c.ECG, DEFAULT, source="lake/ecg/part-7.parquet")


def test_site_column_names_map_onto_the_contract():
    s = settings_from_dict({"columns": {"ecg": {"QRSDur": "qrs_ms"}}})
    raw = pd.DataFrame([ecg_row()]).rename(columns={"qrs_ms": "QRSDur"})
    assert normalise_table(raw, c.ECG, s).clean["qrs_ms"].tolist() == [90.0]


def test_reject_details_never_copy_row_values():
    raw = pd.DataFrame([ecg_row("secret-id-123", qrs_ms=987.0)])
    got = normalise_table(raw, c.ECG, DEFAULT)
    assert "987" not in got.rejects["detail"].iloc[0]


# -- text -------------------------------------------------------------------------------------

def test_a_nul_byte_in_any_text_column_is_rejected_per_row_with_its_reason():
    # PostgreSQL refuses NUL in text: one bad row must not block the night (it is rejected alone).
    rows = pd.DataFrame([ecg_row("E1", "P1"), ecg_row("E2", "P\x002"), ecg_row("E3", "P3", location="ward\x00 7")])
    got = normalise_table(rows, c.ECG, DEFAULT)
    assert got.clean["ecg_id"].tolist() == ["E1"]
    assert got.rejects[["row_key", "reason", "column"]].values.tolist() == [
        ["E2", c.INVALID_TEXT, "patient_id"], ["E3", c.INVALID_TEXT, "location"]]
    assert "P\x002" not in got.rejects.to_string()      # the value itself is never copied


def test_text_that_is_not_utf8_is_rejected_per_row_and_valid_bytes_are_decoded():
    rows = pd.DataFrame([ecg_row("E1", "P1"), ecg_row("E2", "P2")])
    rows["patient_id"] = pd.Series([b"P1", b"P\xff2"], dtype=object)
    got = normalise_table(rows, c.ECG, DEFAULT)
    assert got.clean["patient_id"].tolist() == ["P1"]
    assert got.rejects[["row_key", "reason", "column"]].values.tolist() == [["E2", c.INVALID_TEXT, "patient_id"]]
