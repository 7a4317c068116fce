"""Long-QT screen: QTc formulas, AHA limits, modifiers, Tisdale 2013, caveats.

Sources named beside each check: AHA-2009-IV (prolonged >= 450 ms men, >= 460 ms women; from
memory), AHA-2010-TDP = Drew 2010 (QTc > 500 ms, rise > 60 ms: high risk of torsade; from
memory), BOGOSSIAN-2014 (QT - 0.485 x QRS, derived in paced LBBB; checked against the abstract),
TISDALE-2013, PRACTICE (common practice), LOCAL (cardiosieve's choice).
"""

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cardiosieve.screens.criteria import load_rules
from cardiosieve.screens.long_qt import (
    ALL_MODIFIERS_WORDS,
    BOGOSSIAN_QRS_FACTOR,
    TIER_HIGH_QTC,
    TIER_NOT_EVALUABLE,
    TIER_PROLONGED,
    TIER_RISE_OR_MODIFIER,
    qtc_all,
    screen_long_qt,
)
from screen_builders import ecg_rows, lead_rows

RULES = load_rules()


def run(rules=RULES, **row):
    return screen_long_qt(ecg_rows(**row), lead_rows(), rules)


def tier_of(rules=RULES, **row):
    out = run(rules, **row)
    return None if out.empty else int(out["tier"].iloc[0])


def evidence(out):
    return json.loads(out["evidence"].iloc[0])


def caveats(out):
    return json.loads(out["caveats"].iloc[0])


# Every modifier input present and none met: K, Mg, Ca normal (builder defaults), man of 55,
# 60 bpm, no drugs and no loop diuretic recorded in the 24 h.
ALL_KNOWN = {"qt_drug_count_24h": 0, "loop_diuretic_24h": False}


@pytest.mark.parametrize(
    "qt, hr, formula, expected",
    [
        # Check values in docs/references.md (computed from each formula).
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
    assert tier_of(bazett, qt_ms=360.0, heart_rate_bpm=100.0) == TIER_PROLONGED


# At RR 1000 ms every formula leaves QT unchanged, so qt_ms is the QTc.
@pytest.mark.parametrize(
    "sex, qt, tier",
    [
        # AHA-2009-IV (from memory): prolonged >= 450 ms men, >= 460 ms women; prolonged alone is tier 3.
        ("M", 449.9, None), ("M", 450.0, 3), ("M", 450.1, 3),
        # Female sex is itself a risk modifier (TISDALE-2013), so a prolonged woman is tier 2.
        ("F", 459.9, None), ("F", 460.0, 2), ("F", 460.1, 2),
        # Unknown sex: the men's limit (more sensitive; LOCAL choice); the female modifier is unknown.
        (None, 449.9, None), (None, 450.0, 3), (None, 450.1, 3),
    ],
)
def test_prolonged_limits_by_sex(sex, qt, tier):
    assert tier_of(qt_ms=qt, sex=sex) == tier


def test_unknown_sex_carries_a_caveat():
    out = run(qt_ms=455.0, sex=None)
    # AHA-2009-IV men's limit 450 ms (from memory), formatted from the rule applied.
    assert "Sex unknown: the men's limit (450 ms), the more sensitive, was used." in caveats(out)
    assert "female" in evidence(out)["tisdale"]["missing"]
    assert "female" in evidence(out)["values"]["modifiers_not_assessed"]


PRIOR_385 = {"prior_ecg_id": "ecg-0", "prior_qt_ms": 385.0, "prior_rr_ms": 1000.0}


@pytest.mark.parametrize(
    "row, tier",
    [
        # AHA-2010-TDP (Drew 2010, from memory): QTc > 500 ms is high risk of torsade, tier 1 on its
        # own; exactly 500 is only prolonged (AHA-2009-IV): tier 3 alone, tier 2 with a modifier.
        ({"qt_ms": 500.0}, 3), ({"qt_ms": 500.1}, 1), ({"qt_ms": 560.0}, 1),
        ({"qt_ms": 500.0, "age_years": 70.0}, 2), ({"qt_ms": 500.1, "age_years": 70.0}, 1),
        # All modifier inputs present and none met: QTc > 500 is still tier 1 (Drew 2010).
        ({"qt_ms": 500.1, **ALL_KNOWN}, 1),
        # Every modifier input missing: QTc > 500 is still tier 1 (Drew 2010).
        ({"qt_ms": 500.1, "k_mmol_l": np.nan, "mg_mmol_l": np.nan, "ca_mmol_l": np.nan, "sex": None,
          "age_years": np.nan}, 1),
        # AHA-2010-TDP (Drew 2010, from memory): a rise of > 60 ms from the prior ECG; 60 exactly is not.
        # A rise counts even when this QTc is below the prolonged limit: 385 -> 445.1 ms.
        ({"qt_ms": 445.0, **PRIOR_385}, None),
        ({"qt_ms": 445.1, **PRIOR_385}, 2),
        ({"qt_ms": 445.0, "age_years": 70.0, **PRIOR_385}, None),  # a modifier alone, not prolonged: nothing
        # Prolonged with a 60 ms rise exactly: prolonged alone (3); rise 60.1: tier 2.
        ({"qt_ms": 450.0, "prior_ecg_id": "ecg-0", "prior_qt_ms": 390.0, "prior_rr_ms": 1000.0}, 3),
        ({"qt_ms": 450.1, "prior_ecg_id": "ecg-0", "prior_qt_ms": 390.0, "prior_rr_ms": 1000.0}, 2),
        # Rise and a modifier and prolonged, not > 500: still tier 2 (only QTc > 500 is tier 1).
        ({"qt_ms": 480.0, "k_mmol_l": 3.2, **PRIOR_385}, 2),
        # Rise and QTc > 500: tier 1.
        ({"qt_ms": 510.0, **PRIOR_385}, 1),
        # A prior with no usable QT: the rise is unknown, never a rise; prolonged alone is tier 3.
        ({"qt_ms": 470.0, "prior_ecg_id": "ecg-0", "prior_qt_ms": np.nan, "prior_rr_ms": 1000.0}, 3),
    ],
)
def test_high_risk_boundaries_and_combinations(row, tier):
    assert tier_of(**row) == tier


def test_tier_constants_are_the_documented_order():
    # The module docstring's table: QTc > 500 (1), rise or prolonged with a modifier (2),
    # prolonged alone (3), not evaluable (4).
    assert (TIER_HIGH_QTC, TIER_RISE_OR_MODIFIER, TIER_PROLONGED, TIER_NOT_EVALUABLE) == (1, 2, 3, 4)


def test_rise_compares_like_with_like_and_is_the_trend():
    out = run(qt_ms=470.0, prior_ecg_id="ecg-0", prior_qt_ms=400.0, prior_heart_rate_bpm=60.0)
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["trend"] == pytest.approx(70.0) and parts["prior_present"] == 1
    assert "prior 400 ms (+70 ms)" in out["summary"].iloc[0]


@pytest.mark.parametrize(
    "row, modifier",
    [
        # Each modifier just past its cut point turns "prolonged alone" (3) into tier 2.
        ({"k_mmol_l": 3.4}, "k_low"),              # K < 3.5 mmol/L (PRACTICE)
        ({"mg_mmol_l": 0.69}, "mg_low"),           # Mg < 0.70 mmol/L (PRACTICE)
        ({"ca_mmol_l": 2.09}, "ca_low"),           # Ca < 2.10 mmol/L (PRACTICE)
        ({"heart_rate_bpm": 49.0}, "bradycardia"),  # HR < 50 bpm (PRACTICE)
        ({"age_years": 68.0}, "age_older"),        # age >= 68 y (TISDALE-2013)
        ({"qt_drug_count_24h": 1}, "qt_drug"),     # site drug class (TISDALE-2013 item)
        ({"loop_diuretic_24h": True}, "loop_diuretic"),  # TISDALE-2013 item
    ],
)
def test_each_risk_modifier(row, modifier):
    qt = 520.0 if "heart_rate_bpm" in row else 470.0  # prolonged in a man either way, not > 500
    out = run(qt_ms=qt, **row)
    assert int(out["tier"].iloc[0]) == TIER_RISE_OR_MODIFIER
    assert evidence(out)["values"]["modifiers"] == [modifier]


@pytest.mark.parametrize(
    "row",
    [{"k_mmol_l": 3.5}, {"mg_mmol_l": 0.70}, {"ca_mmol_l": 2.10}, {"heart_rate_bpm": 50.0},
     {"age_years": 67.0}, {"qt_drug_count_24h": 0}, {"loop_diuretic_24h": False}],
)
def test_at_each_modifier_cut_point_it_does_not_count(row):
    # Same sources as above; each operator is strict ("<"), or ">=" for age: 67 is below it.
    qt = 520.0 if "heart_rate_bpm" in row else 470.0
    out = run(qt_ms=qt, **row)
    assert int(out["tier"].iloc[0]) == TIER_PROLONGED and evidence(out)["values"]["modifiers"] == []


def test_several_modifiers_are_all_named_and_tier_stays_2_below_500():
    # K < 3.5 and Mg < 0.70 (PRACTICE), female (TISDALE-2013), loop diuretic: four modifiers, QTc 480.
    out = run(qt_ms=480.0, sex="F", k_mmol_l=3.1, mg_mmol_l=0.6, loop_diuretic_24h=True, qt_drug_count_24h=0)
    assert int(out["tier"].iloc[0]) == TIER_RISE_OR_MODIFIER
    assert evidence(out)["values"]["modifiers"] == ["k_low", "mg_low", "female", "loop_diuretic"]
    assert "modifiers: K 3.1 mmol/L, Mg 0.60 mmol/L, female, loop diuretic in 24 h" in out["summary"].iloc[0]
    # Severity (module docstring): 0.7 * (480 - 460) / 100 + 0.3 * min(4, 3) / 3 = 0.44.
    assert json.loads(out["score_parts"].iloc[0])["severity"] == pytest.approx(0.44)


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
    # K 3.5: a Tisdale point (<= 3.5) but not the hypokalaemia modifier (< 3.5, PRACTICE): each as its
    # source words it.
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
    assert int(out["tier"].iloc[0]) == TIER_PROLONGED
    wide = [c for c in caveats(out) if "Bogossian" in c]
    assert len(wide) == 1
    # The caveat says where the formula comes from, what it took off and the unadjusted QTc.
    assert "derived in left bundle branch block" in wide[0]
    assert "subtracts 67.9 ms" in wide[0] and "Unadjusted QTc 520 ms" in wide[0]
    assert f"({BOGOSSIAN_QRS_FACTOR * 120:.1f} ms off QT)" in wide[0]  # the step at QRS 120 ms


@pytest.mark.parametrize("formula", ["fridericia", "bazett", "framingham", "hodges"])
@pytest.mark.parametrize("hr", [50.0, 60.0, 75.0])
def test_qtc_steps_down_at_qrs_120_by_the_bogossian_amount(formula, hr):
    # BOGOSSIAN-2014 (QT - 0.485 x QRS) applies from qrs_wide >= 120 ms (PRACTICE). Between QRS 119
    # and 120 ms the QT used drops by 0.485 * 120 = 58.2 ms; the QTc drops by that amount run
    # through the formula: / RR^(1/3) Fridericia, / RR^(1/2) Bazett, unchanged Framingham, Hodges.
    rules = load_rules({"long_qt": {"qtc_formula": formula}})
    rr_ms = 60000.0 / hr
    step_qt = BOGOSSIAN_QRS_FACTOR * 120.0
    expected = qtc_all(np.array([600.0]), np.array([rr_ms]))[formula][0] - qtc_all(
        np.array([600.0 - step_qt]), np.array([rr_ms]))[formula][0]
    aligned = ecg_rows(2, qt_ms=600.0, heart_rate_bpm=hr, qrs_ms=[119.0, 120.0])
    out = screen_long_qt(aligned, lead_rows(), rules).set_index("ecg_id")
    qtc = {e: json.loads(out.loc[e, "evidence"])["values"]["qtc_ms"] for e in out.index}
    assert qtc["ecg-1"] - qtc["ecg-2"] == pytest.approx(expected, abs=1e-3)
    # The documented sizes, from the formula: 58.2 ms at 60 bpm for every formula.
    if hr == 60.0:
        assert expected == pytest.approx(58.2, abs=1e-9)
    if formula == "fridericia":
        assert expected == pytest.approx(step_qt / np.cbrt(rr_ms / 1000.0), abs=1e-9)


def test_the_step_at_qrs_120_can_cross_a_tier_and_the_caveat_shows_it():
    # BOGOSSIAN-2014 step: QT 560 at 60 bpm is QTc 560 (> 500, AHA-2010-TDP: tier 1) at QRS 119
    # and 560 - 58.2 = 501.8 (still > 500) at QRS 120; QT 550 gives 550 vs 491.8 (prolonged only).
    aligned = ecg_rows(4, qt_ms=[560.0, 560.0, 550.0, 550.0], qrs_ms=[119.0, 120.0, 119.0, 120.0])
    out = screen_long_qt(aligned, lead_rows(), RULES)
    assert dict(zip(out["ecg_id"], out["tier"])) == {"ecg-1": 1, "ecg-2": 1, "ecg-3": 1, "ecg-4": 3}
    wide = json.loads(out.set_index("ecg_id").loc["ecg-4", "caveats"])
    assert any("Unadjusted QTc 550 ms" in c for c in wide)


@pytest.mark.parametrize(
    "row, fragment",
    [
        # PRACTICE: rate correction unreliable outside 50-100 bpm (hr_correction_low/high).
        ({"heart_rate_bpm": 110.0, "qt_ms": 420.0}, "outside 50-100 bpm"),
        ({"heart_rate_bpm": 45.0, "qt_ms": 520.0}, "outside 50-100 bpm"),
        # LOCAL irregular-rhythm proxy: no PR, rate and RR disagree by > 10 % (60000/70 vs 1000 ms: 16.7 %).
        ({"pr_ms": np.nan, "rr_ms": 1000.0, "heart_rate_bpm": 70.0, "qt_ms": 480.0},
         "disagree by more than 10 %: an irregular rhythm"),
    ],
)
def test_caveats(row, fragment):
    out = run(**row)
    assert any(fragment in c for c in caveats(out))


@pytest.mark.parametrize("hr, caveat", [(49.0, True), (50.0, False), (100.0, False), (101.0, True)])
def test_rate_caveat_boundaries(hr, caveat):
    # PRACTICE: "< 50" and "> 100" bpm; 50 and 100 themselves are inside the range.
    out = run(heart_rate_bpm=hr, qt_ms=600.0)
    assert any("outside 50-100 bpm" in c for c in caveats(out)) == caveat


def test_regular_rhythm_without_pr_is_not_called_irregular():
    out = run(pr_ms=np.nan, qt_ms=470.0)  # rate and RR agree exactly
    assert not any("irregular rhythm" in c for c in caveats(out))


def test_missing_qt_is_not_evaluable_not_a_silent_pass():
    out = run(qt_ms=np.nan)
    assert int(out["tier"].iloc[0]) == TIER_NOT_EVALUABLE
    assert out["summary"].iloc[0] == "QTc not evaluable: QT interval missing"
    off = load_rules({"long_qt": {"report_not_evaluable": False}})
    assert run(off, qt_ms=np.nan).empty


@settings(max_examples=100, deadline=None)
@given(qt=st.floats(200.0, 700.0))
def test_the_four_formulas_agree_at_60_bpm(qt):
    # Every correction is anchored at 60 bpm (RR 1 s), so there each leaves QT unchanged.
    values = qtc_all(np.array([qt]), np.array([1000.0]))
    for v in values.values():
        assert v[0] == pytest.approx(qt, abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(qt=st.floats(380.0, 560.0), dqt=st.floats(0.0, 80.0), hr=st.floats(40.0, 130.0),
       sex=st.sampled_from(["F", "M", None]), k=st.sampled_from([np.nan, 3.2, 4.2]),
       prior_qt=st.sampled_from([np.nan, 380.0, 420.0]), qrs=st.sampled_from([90.0, 119.0, 130.0]),
       drugs=st.sampled_from([None, 0, 2]))
def test_a_longer_qt_never_lowers_the_tier(qt, dqt, hr, sex, k, prior_qt, qrs, drugs):
    # L1 property: a higher QTc, all else equal (modifiers, prior, QRS), never a less urgent tier.
    aligned = ecg_rows(2, qt_ms=[qt, qt + dqt], heart_rate_bpm=hr, sex=sex, k_mmol_l=k, qrs_ms=qrs,
                       prior_ecg_id="ecg-0", prior_qt_ms=prior_qt, prior_heart_rate_bpm=60.0, prior_rr_ms=1000.0,
                       qt_drug_count_24h=[drugs, drugs])
    out = screen_long_qt(aligned, lead_rows(), RULES)
    tiers = dict(zip(out["ecg_id"], out["tier"]))
    assert tiers.get("ecg-2", 5) <= tiers.get("ecg-1", 5)


# --------------------------------------------------------------------------- L2: unknown modifiers


@pytest.mark.parametrize(
    "row, words, not_assessed",
    [
        # Every input present, none met: only then "no risk modifier".
        (ALL_KNOWN, [ALL_MODIFIERS_WORDS], []),
        # The builders' default: labs and demographics present, medication columns null.
        ({}, ["modifiers: none among the inputs present", "no medication data"], ["qt_drug", "loop_diuretic"]),
        # No K and no Mg in the lab window, no medication data.
        ({"k_mmol_l": np.nan, "mg_mmol_l": np.nan},
         ["modifiers: none among the inputs present", "not measured: K, Mg", "no medication data"],
         ["k_low", "mg_low", "qt_drug", "loop_diuretic"]),
        # Only one medication column known.
        ({"qt_drug_count_24h": 0, "ca_mmol_l": np.nan},
         ["modifiers: none among the inputs present", "not measured: Ca", "no data on loop diuretics"],
         ["ca_low", "loop_diuretic"]),
        # Sex and age not recorded.
        ({"sex": None, "age_years": np.nan, **ALL_KNOWN},
         ["modifiers: none among the inputs present", "not recorded: sex, age"], ["female", "age_older"]),
        # A modifier met and others unknown: the met ones named, the unknown ones too.
        ({"sex": "F", "k_mmol_l": np.nan, "qt_drug_count_24h": 1},
         ["modifiers: female, 1 QT-prolonging drug(s) in 24 h", "not measured: K", "no data on loop diuretics"],
         ["k_low", "loop_diuretic"]),
    ],
)
def test_unknown_modifiers_are_named_never_called_absent(row, words, not_assessed):
    out = run(qt_ms=470.0, **row)
    summary = out["summary"].iloc[0]
    # In order, right after the QTc words and before the Tisdale score.
    assert "limit; " + "; ".join(words) + "; Tisdale" in summary
    assert "no risk modifiers" not in out["summary"].iloc[0]
    assert evidence(out)["values"]["modifiers_not_assessed"] == not_assessed
    unknown_caveats = [c for c in caveats(out) if c.startswith("Not every risk modifier could be assessed")]
    if not_assessed:
        assert len(unknown_caveats) == 1
        assert all(w in unknown_caveats[0] for w in words[1:])
    else:
        assert unknown_caveats == []


def test_unknown_modifiers_do_not_change_the_tier():
    # Prolonged (AHA-2009-IV) with every lab and drug input missing: still "prolonged alone" (3),
    # the caveat saying the tier counts only the modifiers assessed (LOCAL choice).
    out = run(qt_ms=470.0, k_mmol_l=np.nan, mg_mmol_l=np.nan, ca_mmol_l=np.nan)
    assert int(out["tier"].iloc[0]) == TIER_PROLONGED
    assert any(c.endswith("An unassessed modifier, if present, would make this finding tier 2.") for c in caveats(out))
    assert run(qt_ms=470.0, **ALL_KNOWN)["tier"].iloc[0] == TIER_PROLONGED
    # Above 500 ms (AHA-2010-TDP) the tier is already 1: the caveat names the gap and no more.
    high = caveats(run(qt_ms=520.0, k_mmol_l=np.nan))
    assert "Not every risk modifier could be assessed (not measured: K; no medication data); " \
           "the tier counts only the modifiers assessed." in high


# --------------------------------------------------------------------------- L4: texts from the rules applied


def test_site_overrides_change_every_number_in_the_texts():
    # Site values (invented for the test): rate range 45-110 bpm, men's limit 440 ms, high risk
    # > 480 ms, rise > 50 ms, wide QRS >= 130 ms, rate/RR mismatch > 20 %.
    site = load_rules({"long_qt": {
        "hr_correction_low": 45, "hr_correction_high": 110, "qtc_prolonged_m": 440, "qtc_high_risk": 480,
        "qtc_rise": 50, "qrs_wide": 130, "rr_hr_mismatch": 20}})
    aligned = ecg_rows(
        3,
        qt_ms=[520.0, 520.0, 560.0],     # row 3: 560 / 1.3^(1/3) = 513 ms
        heart_rate_bpm=[40.0, 60.0, 60.0],
        rr_ms=[1500.0, 1000.0, 1300.0],     # row 3: 60 bpm vs RR 1300 ms disagree by 30 %
        pr_ms=[160.0, 160.0, np.nan],
        qrs_ms=[90.0, 135.0, 90.0],
        sex=[None, "M", "M"],
        prior_ecg_id="ecg-0", prior_qt_ms=[np.nan, np.nan, 380.0], prior_rr_ms=1000.0,
    )
    out = screen_long_qt(aligned, lead_rows(), site).set_index("ecg_id")
    text = {e: out.loc[e, "summary"] + " | " + " | ".join(json.loads(out.loc[e, "caveats"])) for e in out.index}
    # Row 1: HR 40 outside the site's 45-110 range; QTc 520 / 1.5^(1/3) = 454 ms; sex unknown, the site's men's limit.
    assert "outside 45-110 bpm" in text["ecg-1"] and "men's limit (440 ms)" in text["ecg-1"]
    # Row 2: QRS 135 >= 130: adjusted; the step at the site's cut point is 0.485 * 130 = 63.0 ms.
    assert "(at or above 130 ms)" in text["ecg-2"]
    assert f"({BOGOSSIAN_QRS_FACTOR * 130:.1f} ms off QT)" in text["ecg-2"]
    # Row 3: the site's high-risk limit and rise limit, and its mismatch percentage.
    assert "above 480 ms" in text["ecg-3"] and "a rise of more than 50 ms" in text["ecg-3"]
    assert "disagree by more than 20 %" in text["ecg-3"]
    for t in text.values():
        for shipped in ("50-100 bpm", "(450 ms)", "above 500 ms", "more than 60 ms", "more than 10 %", "above 120 ms"):
            assert shipped not in t
    assert out.loc["ecg-3", "rule_version"].startswith("long_qt/1.1.0+site.")


def test_a_site_limit_with_decimals_is_written_as_configured_not_rounded():
    # A site's rate range 45.5-99.5 bpm and men's limit 447.5 ms (invented): never rounded in the text.
    site = load_rules({"long_qt": {"hr_correction_low": 45.5, "hr_correction_high": 99.5, "qtc_prolonged_m": 447.5}})
    out = screen_long_qt(ecg_rows(qt_ms=448.0, heart_rate_bpm=60.0, sex=None), lead_rows(), site)
    assert "at or above the 447.5 ms limit" in out["summary"].iloc[0]
    assert "Sex unknown: the men's limit (447.5 ms), the more sensitive, was used." in caveats(out)
    fast = screen_long_qt(ecg_rows(qt_ms=420.0, heart_rate_bpm=100.0), lead_rows(), site)
    assert any("outside 45.5-99.5 bpm" in c for c in caveats(fast))
