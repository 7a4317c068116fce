"""ST-deviation screen: UDMI-2018 cut points, contiguity, territories, look-alikes, prior, troponin.

Source ids resolve in docs/references.md; LOCAL and PRACTICE values are cardiosieve's own choices
or common practice, named as such in screens/rules.toml."""

import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cardiosieve.screens._frame import age_years
from cardiosieve.screens._leads import CONTIGUOUS_PAIRS
from cardiosieve.screens.criteria import load_rules
from cardiosieve.screens.st_deviation import (
    CAVEAT_NEW_DEPRESSION,
    CAVEAT_PACED,
    CAVEAT_SLOPE,
    CAVEAT_TROPONIN,
    screen_st_deviation,
)
from screen_builders import ecg_rows, lead_rows, leads_of, no_leads

RULES = load_rules()


def run(st_j=None, row=None, leads=None, rules=RULES, **lead_kw):
    row = row or {}
    if leads is None:
        leads = lead_rows("ecg-1", st_j_uv=st_j or {}, **lead_kw)
    return screen_st_deviation(ecg_rows(**row), leads, rules)


def found(out):
    return not out.empty


def ev(out):
    return json.loads(out["evidence"].iloc[0])


def cav(out):
    return json.loads(out["caveats"].iloc[0])


# ---------------------------------------------------------------- UDMI-2018 cut points
@pytest.mark.parametrize(
    "sex, age, leads, uv, flagged",
    [
        # UDMI-2018: >= 100 uV in two contiguous leads other than V2-V3.
        ("M", 55, ("II", "aVF"), 100, True), ("M", 55, ("aVF", "III"), 99, False),
        ("F", 55, ("V5", "V6"), 100, True), ("F", 55, ("V5", "V6"), 99, False),
        # V2-V3: >= 200 uV men >= 40 y (either side of 40 y), >= 250 uV men < 40 y, >= 150 uV women.
        ("M", 40, ("V2", "V3"), 200, True), ("M", 40, ("V2", "V3"), 199, False),
        ("M", 39, ("V2", "V3"), 250, True), ("M", 39, ("V2", "V3"), 249, False),
        ("M", 39, ("V2", "V3"), 251, True),
        ("F", 30, ("V2", "V3"), 150, True), ("F", 30, ("V2", "V3"), 149, False),
        ("F", 70, ("V2", "V3"), 151, True),
        # V3R/V4R: >= 50 uV; >= 100 uV in men < 30 y.
        ("M", 30, ("V3R", "V4R"), 50, True), ("M", 30, ("V3R", "V4R"), 49, False),
        ("M", 29, ("V3R", "V4R"), 100, True), ("M", 29, ("V3R", "V4R"), 99, False),
        ("F", 25, ("V3R", "V4R"), 50, True),
        # V7-V9: >= 50 uV; >= 100 uV in men < 40 y.
        ("M", 40, ("V7", "V8"), 50, True), ("M", 40, ("V7", "V8"), 49, False),
        ("M", 39, ("V8", "V9"), 100, True), ("M", 39, ("V8", "V9"), 99, False),
        ("F", 20, ("V7", "V8"), 50, True),
    ],
)
def test_cut_points_of_the_fourth_universal_definition(sex, age, leads, uv, flagged):
    out = run({lead: uv for lead in leads}, row={"sex": sex, "age_years": float(age)})
    assert found(out) is flagged


@pytest.mark.parametrize(
    "st_j",
    [
        {"II": 400},                       # UDMI-2018: a single lead never suffices
        {"V2": 500},
        {"I": 150, "II": 150},             # not neighbours: -aVR lies between them (Cabrera order)
        {"III": 150, "aVL": 150},          # the limb circle does not wrap from III to aVL
        {"V1": 150, "V3": 250},            # V2 between them is normal
        {"V6": 150, "V8": 150},            # V7 between them is absent
    ],
)
def test_non_contiguous_leads_do_not_make_a_finding(st_j):
    assert not found(run(st_j))


def tier(out):
    return int(out["tier"].iloc[0])


def pattern(out):
    return ev(out)["values"]["pattern"]


@pytest.mark.parametrize("pair", [("II", "III"), ("III", "aVF"), ("II", "aVF"), ("I", "aVL"), ("V7", "V9")])
def test_any_two_leads_of_a_udmi_lead_group_are_contiguous(pair):
    # UDMI-2018 lead groups: II, III and aVF are one group (any two contiguous); I, aVL; V7-V9.
    out = run({lead: 150 for lead in pair})
    assert pattern(out) == "st_elevation"


def test_minus_avr_is_supporting_evidence_only():
    # Cabrera order (common practice): -aVR between I and II supports a limb-lead finding but
    # never makes a pair of its own (UDMI-2018 lead groups decide).
    assert not found(run({"I": 100, "aVR": -100}))
    out = run({"II": 150, "aVF": 150, "aVR": -120})
    assert ev(out)["values"]["minus_avr_supporting"] is True and "-aVR" not in ev(out)["values"]["leads_meeting"]
    assert "-aVR agrees (supporting)" in out["summary"].iloc[0]


@pytest.mark.parametrize(
    "st_j, territories",
    [
        ({"II": 150, "III": 200, "aVF": 180}, "inferior"),
        ({"I": 120, "aVL": 150}, "lateral"),
        ({"V5": 120, "V6": 110}, "lateral"),
        ({"V1": 150, "V2": 250}, "septal"),
        ({"V2": 250, "V3": 300, "V4": 200}, "anterior,septal"),
        ({"V4": 200, "V5": 150, "V6": 150}, "lateral,anterior"),
        ({"II": 150, "aVF": 150, "V3R": 80, "V4R": 80}, "inferior,right_ventricular"),
        ({"II": 150, "aVF": 150, "V7": 60, "V8": 60}, "inferior,posterior"),
    ],
)
def test_territories_named_from_the_leads_that_meet_the_cut_points(st_j, territories):
    out = run(st_j)
    assert out["territories"].iloc[0] == territories
    assert ev(out)["values"]["pattern"] == "st_elevation"


def test_reciprocal_depression_is_recorded_and_raises_confidence():
    # UDMI-2018: reciprocal depression >= 50 uV in two contiguous leads of the opposite wall.
    # Two inferior leads at 1.5x their cut point: tier 2 on their own (tier policy, LOCAL).
    inferior = {"II": 150, "aVF": 150}
    with_recip = run({**inferior, "I": -50, "aVL": -80})
    without = run({**inferior, "I": -49, "aVL": -80})
    assert int(with_recip["tier"].iloc[0]) == 1 and ev(with_recip)["values"]["reciprocal_leads"] == ["I", "aVL"]
    assert int(without["tier"].iloc[0]) == 2 and ev(without)["values"]["reciprocal_leads"] == []
    assert "reciprocal depression in I, aVL" in with_recip["summary"].iloc[0]
    assert json.loads(with_recip["score_parts"].iloc[0])["reciprocal"] == 1


def test_avr_elevation_with_widespread_depression_is_its_own_pattern():
    dep = {lead: -50 for lead in ("I", "II", "aVF", "V4", "V5", "V6")}  # six leads (practice)
    out = run({"aVR": 100, **dep})
    assert ev(out)["values"]["pattern"] == "avr_widespread_depression" and out["territories"].iloc[0] == ""
    assert "aVR elevation with widespread depression" in out["summary"].iloc[0]
    dep.pop("V4")
    # Five depressed leads are not "widespread": the depression is a finding of its own (UDMI-2018).
    five = run({"aVR": 100, **dep})
    assert pattern(five) == "st_depression" and tier(five) == 3


# ---------------------------------------------------------------- confounders
WIDE = {"qrs_ms": 150.0}  # with the builder's leads (V1 S-dominant, I and V6 R-dominant): LBBB shape


def test_lbbb_shape_replaces_plain_cut_points():
    # Discordant STE in V1-V2 that meets the plain cut points but is proportionate (ST/S > -0.25).
    out = run({"V1": 200, "V2": 250}, row=WIDE)
    assert not found(out)
    assert found(run({"V1": 200, "V2": 250}))  # the same ST with a narrow QRS is a finding


def test_sgarbossa_concordant_elevation_is_tier_1():
    # SGARBOSSA-1996: concordant STE >= 1 mm in an R-dominant lead = 5 points (>= 3 positive).
    out = run({"V5": 100}, row=WIDE)
    v = ev(out)["values"]
    assert v["pattern"] == "lbbb_or_paced" and v["sgarbossa_points"] == 5 and int(out["tier"].iloc[0]) == 1
    assert any("left-bundle-branch-block shape: judged by Sgarbossa" in c for c in cav(out))
    assert out["territories"].iloc[0] == "lateral"
    assert not found(run({"V5": 99}, row=WIDE))


def test_sgarbossa_concordant_depression_in_v1_v3():
    # SGARBOSSA-1996: concordant STD >= 1 mm in V1-V3 (S-dominant) = 3 points, positive alone.
    out = run({"V2": -100}, row=WIDE)
    assert ev(out)["values"]["sgarbossa_points"] == 3 and int(out["tier"].iloc[0]) == 1
    assert not found(run({"V2": -99}, row=WIDE))


def test_smith_modified_st_s_ratio():
    # SMITH-2012: discordant STE >= 1 mm with ST/S <= -0.25. V3: S -800 uV, so 200 uV is exactly -0.25.
    out = run({"V3": 200}, row=WIDE)
    # SMITH-2012: the modified rule positive on the ratio alone is tier 1, like Sgarbossa >= 3.
    v = ev(out)["values"]
    assert v["smith_modified_positive"] is True and v["sgarbossa_points"] == 0 and int(out["tier"].iloc[0]) == 1
    assert not found(run({"V3": 199}, row=WIDE))  # -0.249


def test_sgarbossa_discordant_5_mm_alone_scores_2_but_smith_ratio_decides():
    # SGARBOSSA-1996: discordant STE >= 5 mm = 2 points (not enough alone).
    # V2: S -2400 uV, ST 500 uV -> ratio -0.21: neither rule positive.
    out = run({"V2": 500}, row=WIDE, s_amp_uv={"V2": -2400})
    assert not found(out)


def test_paced_rhythm_uses_the_same_rules_with_its_own_caveat():
    out = run({"V5": 120}, row={"paced": True})
    assert CAVEAT_PACED in cav(out) and ev(out)["values"]["pattern"] == "lbbb_or_paced"


def test_wide_qrs_without_lbbb_shape_keeps_plain_cut_points_with_a_caveat():
    # RBBB-like: V1 R-dominant.
    out = run({"II": 150, "aVF": 150}, row=WIDE, r_amp_uv={"V1": 900}, s_amp_uv={"V1": -200})
    assert ev(out)["values"]["pattern"] == "st_elevation"
    assert any("without a left-bundle-branch-block shape" in c for c in cav(out))


@pytest.mark.parametrize(
    "row, lead_kw, lvh",
    [
        # SOKOLOW-1949: S V1 + R V5/V6 >= 35 mm (3500 uV).
        ({}, {"s_amp_uv": {"V1": -2100}, "r_amp_uv": {"V5": 1400}}, True),
        ({}, {"s_amp_uv": {"V1": -2099}, "r_amp_uv": {"V5": 1400}}, False),
        # CORNELL-1985: R aVL + S V3 > 28 mm men, > 20 mm women.
        ({"sex": "F"}, {"r_amp_uv": {"aVL": 1201}, "s_amp_uv": {"V3": -800}}, True),
        ({"sex": "F"}, {"r_amp_uv": {"aVL": 1200}, "s_amp_uv": {"V3": -800}}, False),
        ({"sex": "M"}, {"r_amp_uv": {"aVL": 1201}, "s_amp_uv": {"V3": -800}}, False),
        ({"sex": "M"}, {"r_amp_uv": {"aVL": 2001}, "s_amp_uv": {"V3": -800}}, True),
    ],
)
def test_lvh_voltage_never_explains_inferior_elevation(row, lead_kw, lvh):
    # LVH voltage explains proportionate V1-V3 elevation and lateral depression only (local
    # reading of the repolarisation change), so inferior elevation keeps its rank either way.
    out = run({"II": 150, "aVF": 150}, row=row, **lead_kw)
    assert ev(out)["values"]["lvh_voltage"] is lvh and ev(out)["values"]["lvh_explains"] is False
    assert tier(out) == 2
    assert any("does not account for this elevation" in c for c in cav(out)) is lvh


# ---------------------------------------------------------------- prior ECG and troponin
@pytest.mark.parametrize(
    "row, raised",
    [
        # UDMI-2018: above the assay's 99th-centile URL; exactly at the URL is not above.
        ({"trop_max_ratio": 1.01, "trop_ng_l": 30.0, "trop_url_ng_l": 26.0}, True),
        ({"trop_max_ratio": 1.0, "trop_ng_l": 26.0, "trop_url_ng_l": 26.0}, False),
        # Rising: delta >= 5 ng/L (LOCAL).
        ({"trop_max_ratio": 0.5, "trop_delta_ng_l": 5.0}, True),
        ({"trop_max_ratio": 0.5, "trop_delta_ng_l": 4.9}, False),
    ],
)
def test_troponin_above_url_or_rising_raises_priority(row, raised):
    out = run({"II": 150, "aVF": 150}, row=row)
    assert int(out["tier"].iloc[0]) == (1 if raised else 2)
    assert (CAVEAT_TROPONIN in cav(out)) is raised
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["troponin_ratio"] == row["trop_max_ratio"] and parts["lab_confirmed"] == int(raised)


# ---------------------------------------------------------------- missing inputs
def test_no_lead_rows_is_not_evaluable_not_a_silent_pass():
    out = screen_st_deviation(ecg_rows(), no_leads(), RULES)
    assert int(out["tier"].iloc[0]) == 4 and ev(out)["values"]["pattern"] == "not_evaluable"
    assert out["summary"].iloc[0].startswith("ST deviation not evaluable: no lead measurements")
    raised = screen_st_deviation(ecg_rows(trop_max_ratio=3.0), no_leads(), RULES)
    assert int(raised["tier"].iloc[0]) == 3
    off = load_rules({"st_deviation": {"report_not_evaluable": False}})
    assert screen_st_deviation(ecg_rows(), no_leads(), off).empty


def test_one_missing_lead_is_named():
    leads = lead_rows("ecg-1", leads=["I", "II", "III", "aVR", "aVL", "aVF", "V1", "V3", "V4", "V5", "V6"])
    out = screen_st_deviation(ecg_rows(), leads, RULES)
    assert "not evaluable in V2" in out["summary"].iloc[0]


def test_unknown_sex_uses_the_most_sensitive_cut_point_and_says_so():
    out = run({"V2": 150, "V3": 150}, row={"sex": None})
    assert found(out) and "Sex unknown: the most sensitive cut points were used (V2-V3 150 uV; V3R/V4R 50 uV; V7-V9 50 uV)." in cav(out)
    # The numbers in the text are the ones applied: a site override shows its own value.
    site = load_rules({"st_deviation": {"ste_v2v3_women": 140}})
    out = run({"V2": 140, "V3": 140}, row={"sex": None}, rules=site)
    assert any("V2-V3 140 uV" in c for c in cav(out))


def test_age_from_birth_date_at_the_ecg():
    # Born 1986-03-02, ECG 2026-03-01 10:00: 39 whole years, so a man's V2-V3 cut point is 250 uV.
    aligned = ecg_rows().drop(columns=["age_years"]).assign(
        birth_date=pd.Series([pd.Timestamp("1986-03-02", tz="UTC")], dtype="datetime64[us, UTC]")
    )
    assert age_years(aligned).tolist() == [39.0]
    leads = lead_rows("ecg-1", st_j_uv={"V2": 220, "V3": 220})
    assert screen_st_deviation(aligned, leads, RULES).empty
    older = aligned.assign(birth_date=pd.Series([pd.Timestamp("1986-03-01", tz="UTC")], dtype="datetime64[us, UTC]"))
    assert age_years(older).tolist() == [40.0] and not screen_st_deviation(older, leads, RULES).empty


# ---------------------------------------------------------------- property
LIMB_AND_PRECORDIAL = ["I", "II", "III", "aVL", "aVF", "V1", "V2", "V3", "V4", "V5", "V6"]


def _batch(st_rows):
    """One aligned frame and lead table holding len(st_rows) ECGs (one screen call per batch)."""
    n = len(st_rows)
    aligned = ecg_rows(n)
    leads = leads_of(*[lead_rows(f"ecg-{i + 1}", st_j_uv=row) for i, row in enumerate(st_rows)])
    out = screen_st_deviation(aligned, leads, RULES)
    return {e: json.loads(v)["values"]["leads_meeting"] for e, v in zip(out["ecg_id"], out["evidence"])}


ECG = st.tuples(
    st.lists(st.sampled_from([0.0, 40.0, 120.0, 260.0]), min_size=11, max_size=11), st.integers(0, 100)
)


@settings(max_examples=25, deadline=None)
@given(batch=st.lists(ECG, min_size=8, max_size=8))
def test_adding_a_contiguous_lead_that_meets_the_cut_point_never_removes_a_finding(batch):
    # More evidence never removes a finding: a further contiguous lead meeting the cut point
    # [UDMI-2018] can only keep or add one. Checked on eight ECGs per screen call to keep it fast.
    bases = [dict(zip(LIMB_AND_PRECORDIAL, values)) for values, _ in batch]
    before = _batch(bases)
    afters, added = [], {}
    for i, (base, (_, pick)) in enumerate(zip(bases, batch)):
        meeting = set(before.get(f"ecg-{i + 1}", []))
        near = {b for a, b in CONTIGUOUS_PAIRS if a in meeting} | {a for a, b in CONTIGUOUS_PAIRS if b in meeting}
        near = sorted(l for l in near if l in LIMB_AND_PRECORDIAL and l not in meeting)
        if meeting and near:
            lead = near[pick % len(near)]
            added[f"ecg-{i + 1}"] = meeting | {lead}
            base = {**base, lead: 260.0}  # 260 uV meets every cut point (UDMI-2018; men < 40 y: 250)
        afters.append(base)
    after = _batch(afters)
    for ecg_id, must in added.items():
        assert ecg_id in after, "a finding was removed"
        assert must <= set(after[ecg_id])


def test_inferior_elevation_with_v1_v2_depression_adds_posterior_whatever_the_r_wave():
    # UDMI-2018: V1-V3 depression points to the posterior wall; a tall R is not required.
    out = run({"II": 200, "III": 200, "aVF": 200, "V1": -80, "V2": -120})
    assert out["territories"].iloc[0] == "inferior,posterior"
    assert "ST depression in V1, V2 (posterior involvement)" in out["summary"].iloc[0]


# ---------------------------------------------------------------- tier policy (docs/prioritisation.md)
WRAP_AROUND = {"V1": 120, "V2": 240, "V3": 240, "V4": 150, "V5": 120, "V6": 110, "II": 120, "III": 110, "aVF": 120}


def test_wrap_around_anterior_elevation_is_st_elevation_with_its_territories_at_tier_1():
    # UDMI-2018: elevation meeting the cut points in two contiguous leads is an ST-elevation
    # finding whatever else is present. Nine leads, no reciprocal depression; aVR at 0 uV and V1
    # elevated (not depressed); V2 at 1.2x its cut point, so not at clear amplitude either.
    out = run({**WRAP_AROUND, "aVR": -60})
    assert pattern(out) == "st_elevation"
    assert out["territories"].iloc[0] == "inferior,lateral,anterior,septal"
    # Pericarditis-like distribution (>= 3 walls, no depression but aVR, aVR not elevated, no lead
    # at 2x its cut point): a caveat and one tier lower, never below tier 2.
    assert tier(out) == 2 and ev(out)["values"]["pericarditis_like"] is True
    assert any("pericarditis-like distribution" in c and "stays at tier 2 or above" in c for c in cav(out))


@pytest.mark.parametrize(
    "extra, why",
    [
        ({"aVR": 50}, "aVR elevated (50 uV is not below the 50 uV limit)"),
        ({"aVR": -60, "aVL": -50}, "depression in aVL"),
        ({"aVR": -60, "II": 240}, "II at 2x its 100 uV cut point: clear amplitude"),
    ],
)
def test_wrap_around_elevation_without_the_pericarditis_distribution_is_tier_1(extra, why):
    # Tier policy (LOCAL): >= 3 leads meeting the cut points is tier 1; the pericarditis-like
    # caveat needs every one of its conditions (PRACTICE), so each near miss stays tier 1.
    out = run({**WRAP_AROUND, **extra})
    assert pattern(out) == "st_elevation" and tier(out) == 1, why
    assert ev(out)["values"]["pericarditis_like"] is False


def test_v1_depression_rules_out_the_pericarditis_like_caveat():
    # "No reciprocal change anywhere, V1 included" (PRACTICE): one lead of V1 depression is
    # not reciprocal (two contiguous leads are needed) but it ends the pericarditis reading.
    st_j = {k: v for k, v in WRAP_AROUND.items() if k != "V1"} | {"V1": -50, "aVR": -60}
    out = run(st_j)
    assert tier(out) == 1 and ev(out)["values"]["pericarditis_like"] is False
    assert ev(out)["values"]["reciprocal_leads"] == []


def test_inferolateral_elevation_without_reciprocal_depression_is_tier_1():
    # UDMI-2018 cut points in II, III, aVF, V5, V6; five leads (tier policy: >= 3 leads, LOCAL).
    out = run({"II": 150, "III": 150, "aVF": 150, "V5": 120, "V6": 120})
    assert pattern(out) == "st_elevation" and out["territories"].iloc[0] == "inferior,lateral" and tier(out) == 1


@pytest.mark.parametrize(
    "st_j, expected",
    [
        # Clear amplitude = a qualifying lead at >= 2x its cut point (LOCAL): 2 mm where the cut is 1 mm.
        ({"II": 199, "aVF": 150}, 2),
        ({"II": 200, "aVF": 150}, 1),
        ({"II": 201, "aVF": 150}, 1),
        # V2-V3 in a man >= 40 y: cut point 200 uV (UDMI-2018), so clear amplitude is 400 uV.
        ({"V2": 399, "V3": 250}, 2),
        ({"V2": 400, "V3": 250}, 1),
        # Or three or more leads meeting the cut points (LOCAL).
        ({"II": 150, "aVF": 150}, 2),
        ({"II": 150, "aVF": 150, "III": 100}, 1),
        ({"II": 150, "aVF": 150, "III": 99}, 2),
    ],
)
def test_tier_1_for_elevation_of_clear_amplitude_without_reciprocal_depression(st_j, expected):
    out = run(st_j, row={"sex": "M", "age_years": 55.0})
    assert pattern(out) == "st_elevation" and tier(out) == expected


@pytest.mark.parametrize(
    "v1_v3, reciprocal",
    [
        # V1-V3 depression >= 50 uV in two of them counts as reciprocal to inferior elevation.
        ({"V2": -50, "V3": -50}, True),
        ({"V1": -50, "V3": -60}, True),
        ({"V2": -49, "V3": -50}, False),
    ],
)
def test_v1_v3_depression_is_reciprocal_to_inferior_and_lateral_elevation(v1_v3, reciprocal):
    # UDMI-2018 via the opposite wall: inferior and lateral elevation are mirrored in V1-V3.
    for wall in ({"II": 150, "aVF": 150}, {"V5": 150, "V6": 150}):
        out = run({**wall, **v1_v3})
        assert bool(ev(out)["values"]["reciprocal_leads"]) is reciprocal
        assert tier(out) == (1 if reciprocal else 2)


# ---------------------------------------------------------------- posterior
@pytest.mark.parametrize(
    "st_j, flagged",
    [
        # UDMI-2018: ST depression >= 0.5 mm (50 uV) in two of V1-V3; normal V1-V2 are S-dominant.
        ({"V1": -50, "V2": -50}, True),
        ({"V1": -50, "V3": -50}, True),
        ({"V2": -49, "V3": -80}, False),
        ({"V1": -200}, False),
    ],
)
def test_v1_v3_depression_is_posterior_equivalent_whether_or_not_r_is_dominant(st_j, flagged):
    out = run(st_j)
    assert found(out) is flagged
    if flagged:
        assert pattern(out) == "posterior_depression" and out["territories"].iloc[0] == "posterior"
        assert tier(out) == 2 and ev(out)["values"]["posterior_dominant_r"] is False


def test_dominant_r_and_upright_t_support_the_posterior_finding_without_changing_its_tier():
    plain = run({"V1": -100, "V2": -100}, t_amp_uv={"V1": -100, "V2": -100})
    tall = run({"V1": -100, "V2": -100}, r_amp_uv={"V1": 600, "V2": 900}, s_amp_uv={"V1": -300, "V2": -400})
    assert tier(plain) == tier(tall) == 2
    assert ev(tall)["values"]["posterior_dominant_r"] is True and ev(tall)["values"]["posterior_upright_t"] is True
    sev = [json.loads(o["score_parts"].iloc[0])["severity"] for o in (plain, tall)]
    assert sev[1] > sev[0]
    assert "without dominant R or upright T" in plain["summary"].iloc[0]


def test_posterior_with_a_troponin_rise_is_tier_1():
    out = run({"V1": -60, "V2": -80}, row={"trop_max_ratio": 2.0, "trop_ng_l": 52.0, "trop_url_ng_l": 26.0})
    assert tier(out) == 1


def test_posterior_leads_keep_their_own_cut_points():
    # UDMI-2018: V7-V9 >= 50 uV (>= 100 uV men < 40 y): elevation there is an elevation finding.
    out = run({"V7": 50, "V8": 60}, row={"sex": "M", "age_years": 45.0})
    assert pattern(out) == "st_elevation" and out["territories"].iloc[0] == "posterior"


# ---------------------------------------------------------------- ST depression on its own
@pytest.mark.parametrize(
    "st_j, flagged",
    [
        # UDMI-2018: new horizontal or downsloping depression >= 0.5 mm in two contiguous leads.
        ({"V5": -50, "V6": -50}, True),
        ({"V5": -49, "V6": -80}, False),
        ({"II": -60, "III": -60}, True),      # any two of the inferior group
        ({"V4": -60, "V6": -60}, False),      # V5 between them is normal
        ({"V5": -30, "V6": -40}, False),      # trivial depression under 0.5 mm stays out
    ],
)
def test_st_depression_alone_is_a_tier_3_finding(st_j, flagged):
    out = run(st_j)
    assert found(out) is flagged
    if flagged:
        assert pattern(out) == "st_depression" and tier(out) == 3 and out["territories"].iloc[0] == ""
        assert CAVEAT_SLOPE in cav(out)


def test_st_depression_with_a_rising_troponin_or_new_against_the_prior_is_tier_2():
    dep = {"V4": -80, "V5": -100, "V6": -60}
    rising = run(dep, row={"trop_max_ratio": 0.8, "trop_delta_ng_l": 6.0})
    assert tier(rising) == 2 and CAVEAT_TROPONIN in cav(rising)
    prior = {"prior_ecg_id": "ecg-0", "prior_gap_h": 20.0}
    new = run(row=prior, leads=leads_of(lead_rows("ecg-1", st_j_uv=dep), lead_rows("ecg-0")))
    assert tier(new) == 2 and CAVEAT_NEW_DEPRESSION in cav(new) and ev(new)["values"]["new_vs_prior"] is True
    both = run(row={**prior, "trop_max_ratio": 3.0},
               leads=leads_of(lead_rows("ecg-1", st_j_uv=dep), lead_rows("ecg-0")))
    assert tier(both) == 2      # depression alone is never ranked with the ST-elevation group
    # The same depression on a prior 4 days old: old, one tier lower.
    old = run(row={"prior_ecg_id": "ecg-0", "prior_gap_h": 96.0},
              leads=leads_of(lead_rows("ecg-1", st_j_uv=dep), lead_rows("ecg-0", st_j_uv=dep)))
    assert tier(old) == 4 and ev(old)["values"]["prior_old"] is True


LVH_LEADS = {"s_amp_uv": {"V1": -2500}, "r_amp_uv": {"V5": 1400}}   # Sokolow-Lyon 3900 uV [SOKOLOW-1949]


def test_lvh_explains_lateral_depression_only():
    lateral = run({"V5": -80, "V6": -80, "I": -60, "aVL": -60}, **LVH_LEADS)
    assert pattern(lateral) == "st_depression" and tier(lateral) == 4
    assert any("ST depression confined to I, aVL, V5, V6" in c for c in cav(lateral))
    anterior = run({"V3": -80, "V4": -80, "V5": -80}, **LVH_LEADS)
    assert tier(anterior) == 3 and ev(anterior)["values"]["lvh_explains"] is False


# ---------------------------------------------------------------- demotions never stack past safety
V1_V3_ELEVATION = {"V1": 150, "V2": 250, "V3": 250}   # man 55 y: 1.5x, 1.25x, 1.25x cut point, three leads
LVH_PROPORTIONATE = {"s_amp_uv": {"V1": -2500, "V2": -1200, "V3": -1100}, "r_amp_uv": {"V5": 1400}}


def test_lvh_explains_proportionate_v1_v3_elevation_by_one_tier_not_below_2():
    out = run(V1_V3_ELEVATION, **LVH_PROPORTIONATE)
    assert tier(out) == 2 and ev(out)["values"]["lvh_explains"] is True
    assert any("ranked one tier lower, not below tier 2" in c for c in cav(out))
    # ST at >= 0.25 x |S| in V3 (275 / 1100) is disproportionate: not explained, tier 1.
    out = run({**V1_V3_ELEVATION, "V3": 275}, **LVH_PROPORTIONATE)
    assert tier(out) == 1 and ev(out)["values"]["lvh_explains"] is False
    # Without LVH voltage the same elevation is tier 1.
    assert tier(run(V1_V3_ELEVATION)) == 1


def test_old_prior_lvh_and_pericarditis_together_keep_an_elevation_at_tier_2():
    now = lead_rows("ecg-1", st_j_uv=V1_V3_ELEVATION, **LVH_PROPORTIONATE)
    before = lead_rows("ecg-0", st_j_uv=V1_V3_ELEVATION, **LVH_PROPORTIONATE)
    out = run(row={"prior_ecg_id": "ecg-0", "prior_gap_h": 200.0}, leads=leads_of(now, before))
    v = ev(out)["values"]
    assert v["prior_old"] is True and v["lvh_explains"] is True and tier(out) == 2
    wrap = run(row={"prior_ecg_id": "ecg-0", "prior_gap_h": 200.0},
               leads=leads_of(lead_rows("ecg-1", st_j_uv=WRAP_AROUND), lead_rows("ecg-0", st_j_uv=WRAP_AROUND)))
    assert ev(wrap)["values"]["pericarditis_like"] is True and ev(wrap)["values"]["prior_old"] is True
    assert tier(wrap) == 2


@pytest.mark.parametrize(
    "gap_h, old",
    [
        # The prior counts as old only when it is older than the 72 h episode window (LOCAL, ">").
        (6.0, False), (72.0, False), (72.5, True), (np.nan, False),
    ],
)
def test_an_elevation_present_hours_earlier_is_persistent_not_old(gap_h, old):
    st_j = {"II": 150, "III": 150, "aVF": 150}   # tier 1 by three leads
    out = run(row={"prior_ecg_id": "ecg-0", "prior_gap_h": gap_h},
              leads=leads_of(lead_rows("ecg-1", st_j_uv=st_j), lead_rows("ecg-0", st_j_uv=st_j)))
    assert ev(out)["values"]["same_as_prior"] is True and ev(out)["values"]["prior_old"] is old
    assert tier(out) == (2 if old else 1)
    if old:
        assert any("before the 72 h episode window: ranked one tier lower, not below tier 2" in c for c in cav(out))
    elif not np.isnan(gap_h):
        assert any("persistent, not old; the rank is not lowered" in c for c in cav(out))
    else:
        assert any("whose time is unknown: the rank is not lowered" in c for c in cav(out))


def test_a_prior_without_lead_values_is_not_evidence_of_an_old_elevation():
    out = run({"II": 150, "aVF": 150}, row={"prior_ecg_id": "ecg-0", "prior_gap_h": 300.0})
    assert tier(out) == 2 and ev(out)["values"]["same_as_prior"] is False
    assert any("prior ECG has no lead measurements" in c for c in cav(out))


def test_unknown_avr_does_not_make_an_elevation_pericarditis_like():
    # Missing data is unknown, never absent: without aVR the distribution cannot be called.
    leads = lead_rows("ecg-1", leads=[l for l in ["I", "II", "III", "aVL", "aVF", "V1", "V2", "V3", "V4", "V5", "V6"]],
                      st_j_uv=WRAP_AROUND)
    out = screen_st_deviation(ecg_rows(), leads, RULES)
    assert ev(out)["values"]["pericarditis_like"] is False and tier(out) == 1
    assert any("No ST value for aVR" in c for c in cav(out))


def test_lbbb_mimic_beside_a_concordant_finding_is_tier_1():
    # Proportionate discordant V1-V2 elevation (the LBBB mimic) with concordant elevation in V5-V6:
    # Sgarbossa 5 points [SGARBOSSA-1996], tier 1, whatever the proportionate part.
    out = run({"V1": 200, "V2": 250, "V5": 150, "V6": 120}, row=WIDE)
    assert pattern(out) == "lbbb_or_paced" and tier(out) == 1 and ev(out)["values"]["sgarbossa_points"] == 5


def test_site_override_of_the_clear_amplitude_shows_in_the_text():
    site = load_rules({"st_deviation": {"ste_clear_ratio": 1.6}})
    out = run({**WRAP_AROUND, "aVR": -60}, rules=site)   # highest lead V4 at 1.5x its cut point
    assert any("no lead at 1.6x its cut point" in c for c in cav(out))
    assert tier(run({"II": 160, "aVF": 150}, rules=site)) == 1
    assert tier(run({"II": 160, "aVF": 150})) == 2


def test_no_demotion_takes_any_elevation_below_tier_2_over_a_grid():
    # Property over the demotions: every combination of old prior, LVH voltage and
    # pericarditis-like distribution, on two-, three- and nine-lead elevations.
    cases = []
    for st_j in ({"II": 150, "aVF": 150}, V1_V3_ELEVATION, WRAP_AROUND):
        for lvh in (False, True):
            for prior in (None, 200.0, 10.0):
                cases.append((st_j, lvh, prior))
    for k, (st_j, lvh, prior) in enumerate(cases):
        kw = LVH_PROPORTIONATE if lvh else {}
        now = lead_rows("ecg-1", st_j_uv={**st_j, "aVR": -60}, **kw)
        leads = now if prior is None else leads_of(now, lead_rows("ecg-0", st_j_uv={**st_j, "aVR": -60}, **kw))
        row = {} if prior is None else {"prior_ecg_id": "ecg-0", "prior_gap_h": prior}
        out = run(row=row, leads=leads)
        assert pattern(out) == "st_elevation" and tier(out) <= 2, (k, st_j, lvh, prior)
