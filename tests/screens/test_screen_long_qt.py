"""Long-QT screen: QTc formulas, AHA limits, modifiers, Tisdale 2013, caveats."""

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from screens.criteria import load_rules
from screens.long_qt import CAVEAT_IRREGULAR, CAVEAT_SEX_UNKNOWN, qtc_all, screen_long_qt
from screen_builders import ecg_rows, lead_rows

RULES = load_rules()


def run(rules=RULES, **row):
    return screen_long_qt(ecg_rows(**row), lead_rows(), rules)


def tier_of(rules=RULES, **row):
    out = run(rules, **row)
    return None if out.empty else int(out["tier"].iloc[0])


def evidence(out):
    return json.loads(out["evidence"].iloc[0])


@pytest.mark.parametrize(
    "qt, hr, formula, expected",
    [
        # Worked values in REFERENCES.md (computed from each formula).
        (400, 60, "bazett", 400.0), (400, 60, "fridericia", 400.0),
        (400, 60, "framingham", 400.0), (400, 60, "hodges", 400.0),
        (360, 100, "bazett", 464.8), (360, 100, "fridericia", 426.8),
        (360, 100, "framingham", 421.6), (360, 100, "hodges", 430.0),
        (440, 100, "bazett", 568.0), (440, 100, "fridericia", 521.7),
    ],
)
def test_worked_qtc_values(qt, hr, formula, expected):
    got = qtc_all(np.array([qt], dtype=float), np.array([60000.0 / hr]))[formula][0]
    assert got == pytest.approx(expected, abs=0.05)


def test_all_four_qtc_values_are_in_the_evidence_and_fridericia_decides_by_default():
    out = run(qt_ms=440.0, heart_rate_bpm=100.0)
    v = evidence(out)["values"]
    assert v["qtc_formula"] == "fridericia" and v["qtc_ms"] == pytest.approx(521.7, abs=0.05)
    assert v["qtc_bazett_ms"] == pytest.approx(568.0, abs=0.05)
    assert v["qtc_framingham_ms"] == pytest.approx(501.6, abs=0.05)  # 440 + 154 * 0.4
    assert v["qtc_hodges_ms"] == pytest.approx(510.0, abs=0.05)  # 440 + 1.75 * 40
    assert out["summary"].iloc[0].startswith("QTc 522 ms (Fridericia; QT 440 ms, heart rate 100 bpm), above 500 ms")


def test_formula_setting_decides():
    # QT 360 at 100 bpm: Fridericia 426.8 (normal), Bazett 464.8 (prolonged in a man).
    assert tier_of(qt_ms=360.0, heart_rate_bpm=100.0) is None
    bazett = load_rules({"long_qt": {"qtc_formula": "bazett"}})
    assert tier_of(bazett, qt_ms=360.0, heart_rate_bpm=100.0) == 4


# At RR 1000 ms every formula leaves QT unchanged, so qt_ms is the QTc.
@pytest.mark.parametrize(
    "sex, qt, tier",
    [
        # AHA-2009-IV: prolonged >= 450 ms men, >= 460 ms women.
        ("M", 449.9, None), ("M", 450.0, 4), ("M", 450.1, 4),
        # Female sex is itself a risk modifier, so a prolonged woman is tier 3.
        ("F", 459.9, None), ("F", 460.0, 3), ("F", 460.1, 3),
        # Unknown sex: the men's limit (more sensitive).
        (None, 449.9, None), (None, 450.0, 4),
    ],
)
def test_prolonged_limits_by_sex(sex, qt, tier):
    assert tier_of(qt_ms=qt, sex=sex) == tier


def test_unknown_sex_carries_a_caveat():
    out = run(qt_ms=455.0, sex=None)
    assert CAVEAT_SEX_UNKNOWN in json.loads(out["caveats"].iloc[0])
    assert "female" in evidence(out)["tisdale"]["missing"]


@pytest.mark.parametrize(
    "row, tier",
    [
        # AHA-2010-TDP: QTc > 500 ms high risk; exactly 500 is only prolonged.
        ({"qt_ms": 500.0}, 4), ({"qt_ms": 500.1}, 2),
        ({"qt_ms": 500.0, "age_years": 70.0}, 3), ({"qt_ms": 500.1, "age_years": 70.0}, 1),
        # AHA-2010-TDP: a rise of > 60 ms from the prior ECG; 60 exactly is not.
        ({"qt_ms": 445.0, "prior_ecg_id": "ecg-0", "prior_qt_ms": 385.0, "prior_rr_ms": 1000.0}, None),
        ({"qt_ms": 445.1, "prior_ecg_id": "ecg-0", "prior_qt_ms": 385.0, "prior_rr_ms": 1000.0}, 2),
    ],
)
def test_high_risk_boundaries(row, tier):
    assert tier_of(**row) == tier


def test_rise_compares_like_with_like_and_is_the_trend():
    out = run(qt_ms=470.0, prior_ecg_id="ecg-0", prior_qt_ms=400.0, prior_heart_rate_bpm=60.0)
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["trend"] == pytest.approx(70.0) and parts["prior_present"] == 1
    assert "prior 400 ms (+70 ms)" in out["summary"].iloc[0]


@pytest.mark.parametrize(
    "row, modifier",
    [
        # Each modifier just past its cut point turns "prolonged alone" (4) into tier 3.
        ({"k_mmol_l": 3.4}, "k_low"),              # K < 3.5 mmol/L (issue; PRACTICE)
        ({"mg_mmol_l": 0.69}, "mg_low"),           # Mg < 0.70 mmol/L (PRACTICE)
        ({"ca_mmol_l": 2.09}, "ca_low"),           # Ca < 2.10 mmol/L (PRACTICE)
        ({"heart_rate_bpm": 49.0}, "bradycardia"),
        ({"age_years": 68.0}, "age_older"),        # age >= 68 y (TISDALE-2013)
        ({"qt_drug_count_24h": 1}, "qt_drug"),
        ({"loop_diuretic_24h": True}, "loop_diuretic"),
    ],
)
def test_each_risk_modifier(row, modifier):
    qt = 520.0 if "heart_rate_bpm" in row else 470.0  # prolonged in a man either way, not > 500
    out = run(qt_ms=qt, **row)
    assert int(out["tier"].iloc[0]) == 3
    assert evidence(out)["values"]["modifiers"] == [modifier]


@pytest.mark.parametrize(
    "row",
    [{"k_mmol_l": 3.5}, {"mg_mmol_l": 0.70}, {"ca_mmol_l": 2.10}, {"heart_rate_bpm": 50.0},
     {"age_years": 67.0}, {"qt_drug_count_24h": 0}, {"loop_diuretic_24h": False}],
)
def test_at_each_modifier_cut_point_it_does_not_count(row):
    qt = 520.0 if "heart_rate_bpm" in row else 470.0
    out = run(qt_ms=qt, **row)
    assert int(out["tier"].iloc[0]) == 4 and evidence(out)["values"]["modifiers"] == []


def test_lab_modifier_is_the_deciding_lab():
    out = run(qt_ms=470.0, k_mmol_l=3.2, k_offset_min=-90.0)
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["lab_confirmed"] == 1 and parts["lab_gap_min"] == 90


def test_tisdale_score_from_present_inputs_is_partial_and_lists_missing():
    # TISDALE-2013: age >= 68 1, female 1, loop diuretic 1, K <= 3.5 2, QTc >= 450 2, >= 2 drugs 6 = 13.
    out = run(qt_ms=470.0, sex="F", age_years=70.0, loop_diuretic_24h=True, k_mmol_l=3.5, qt_drug_count_24h=2)
    t = evidence(out)["tisdale"]
    assert t["points"] == 13 and t["partial"] is True and t["band"] == "high"
    assert t["missing"] == ["acute_mi", "sepsis", "heart_failure"]
    # K 3.5: a Tisdale point (<= 3.5) but not the modifier (< 3.5): each as its source words it.
    assert "k_low" not in evidence(out)["values"]["modifiers"]
    assert t["items"]["k_3_5_or_less"] == 2


def test_tisdale_lists_missing_medication_and_age():
    out = run(qt_ms=470.0, age_years=np.nan)
    t = evidence(out)["tisdale"]
    assert {"age_68_or_more", "loop_diuretic", "qt_drugs"} <= set(t["missing"])
    assert t["points"] == 2  # QTc >= 450 only
    assert "partial" in out["summary"].iloc[0]


def test_wide_qrs_uses_the_bogossian_modified_qt_and_says_so():
    # BOGOSSIAN-2014: QTm = QT - 0.485 * QRS = 520 - 67.9 = 452.1 ms at RR 1000 (prolonged, not > 500).
    out = run(qt_ms=520.0, qrs_ms=140.0)
    v = evidence(out)["values"]
    assert v["qt_adjustment"] == "bogossian" and v["qtc_ms"] == pytest.approx(452.1, abs=0.05)
    assert v["jt_ms"] == 380 and v["qtc_unadjusted_ms"] == pytest.approx(520.0)
    assert int(out["tier"].iloc[0]) == 4
    assert any("Bogossian" in c for c in json.loads(out["caveats"].iloc[0]))


@pytest.mark.parametrize(
    "row, fragment",
    [
        ({"heart_rate_bpm": 110.0, "qt_ms": 420.0}, "outside 50-100 bpm"),
        ({"heart_rate_bpm": 45.0, "qt_ms": 520.0}, "outside 50-100 bpm"),
        ({"pr_ms": np.nan, "rr_ms": 1000.0, "heart_rate_bpm": 70.0, "qt_ms": 480.0}, CAVEAT_IRREGULAR),
    ],
)
def test_caveats(row, fragment):
    out = run(**row)
    assert any(fragment in c for c in json.loads(out["caveats"].iloc[0]))


def test_regular_rhythm_without_pr_is_not_called_irregular():
    out = run(pr_ms=np.nan, qt_ms=470.0)  # rate and RR agree exactly
    assert CAVEAT_IRREGULAR not in json.loads(out["caveats"].iloc[0])


def test_missing_qt_is_not_evaluable_not_a_silent_pass():
    out = run(qt_ms=np.nan)
    assert int(out["tier"].iloc[0]) == 4 and out["summary"].iloc[0] == "QTc not evaluable: QT interval missing"
    off = load_rules({"long_qt": {"report_not_evaluable": False}})
    assert run(off, qt_ms=np.nan).empty


@settings(max_examples=100, deadline=None)
@given(qt=st.floats(200.0, 700.0))
def test_the_four_formulas_agree_at_60_bpm(qt):
    # Property from the issue: at RR 1 s every correction leaves QT unchanged.
    values = qtc_all(np.array([qt]), np.array([1000.0]))
    for v in values.values():
        assert v[0] == pytest.approx(qt, abs=1e-9)


@settings(max_examples=40, deadline=None)
@given(qt=st.floats(380.0, 560.0), dqt=st.floats(0.0, 80.0), hr=st.floats(40.0, 130.0), female=st.booleans())
def test_a_longer_qt_never_lowers_the_tier(qt, dqt, hr, female):
    aligned = ecg_rows(2, qt_ms=[qt, qt + dqt], heart_rate_bpm=hr, sex="F" if female else "M")
    out = screen_long_qt(aligned, lead_rows(), RULES)
    tiers = dict(zip(out["ecg_id"], out["tier"]))
    assert tiers.get("ecg-2", 5) <= tiers.get("ecg-1", 5)
