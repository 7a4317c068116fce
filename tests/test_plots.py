"""The review page's plot data (pipeline/plots.py): the cut point drawn is the one the screen
applied, read off the finding's evidence; unknown values stay NaN, never dropped silently.
Findings here come from the real ST screen on invented ECGs (tests/screens/screen_builders.py)."""
import json
import math

import pandas as pd
import pytest

from cardiosieve.pipeline import plots
from cardiosieve.screens.criteria import load_rules
from cardiosieve.screens.st_deviation import screen_st_deviation
from tests.screens.screen_builders import ecg_rows, lead_rows


def st_evidence(st_j: dict, **row) -> dict:
    found = screen_st_deviation(ecg_rows(**row), lead_rows(st_j_uv=st_j))
    assert len(found) == 1, "the invented ECG must be flagged"
    return json.loads(found["evidence"].iloc[0])


@pytest.mark.parametrize("sex, age, key", [
    # UDMI-2018: V2-V3 >= 150 uV in women (any age), >= 200 uV men >= 40 y, >= 250 uV men < 40 y.
    ("F", 35.0, "ste_v2v3_women"),
    ("M", 40.0, "ste_v2v3_men_older"),
    ("M", 38.0, "ste_v2v3_men_younger"),
])
def test_the_v2_v3_cut_point_drawn_is_the_rule_the_evidence_names(sex, age, key):
    evidence = st_evidence({"V2": 300, "V3": 300}, sex=sex, age_years=age)
    rule = next(r for r in evidence["rules"] if r["key"] == key)
    d = plots.st_plot_data(evidence).set_index("lead")
    assert d.loc["V2", "cut_uv"] == rule["value"] and d.loc["V3", "cut_uv"] == rule["value"]
    assert d.loc["V2", "cut_key"] == key and d.loc["V2", "cut_source"] == "UDMI-2018"
    assert bool(d.loc["V2", "meets"]) and bool(d.loc["V3", "meets"])


def test_a_female_under_40_and_a_male_over_40_get_different_lines_from_their_own_evidence():
    woman = plots.st_plot_data(st_evidence({"V2": 300, "V3": 300}, sex="F", age_years=35.0)).set_index("lead")
    man = plots.st_plot_data(st_evidence({"V2": 300, "V3": 300}, sex="M", age_years=45.0)).set_index("lead")
    # The shipped values (screens/rules.toml, UDMI-2018): 150 uV for her, 200 uV for him.
    assert woman.loc["V2", "cut_uv"] == 150 and man.loc["V2", "cut_uv"] == 200


def test_a_site_override_is_what_is_drawn_not_the_shipped_value():
    rules = load_rules({"st_deviation": {"ste_v2v3_women": 140}})
    found = screen_st_deviation(ecg_rows(sex="F", age_years=50.0), lead_rows(st_j_uv={"V2": 145, "V3": 145}), rules)
    d = plots.st_plot_data(json.loads(found["evidence"].iloc[0])).set_index("lead")
    assert d.loc["V2", "cut_uv"] == 140 and d.loc["V2", "cut_source"].startswith("site")


def test_the_cut_point_comes_from_the_evidence_not_from_sex_and_age():
    # Evidence written by hand: a man of 45 whose stored rule says 250 uV. The page must draw
    # what the stored finding applied, whatever the sex and age would give today.
    evidence = {"values": {"pattern": "st_elevation", "sex": "M", "age_years": 45, "st_j_uv": {"V2": 260, "V3": 270},
                           "leads_meeting": ["V2", "V3"], "cut_points_uv": {"V2": 250, "V3": 250}},
                "rules": [{"key": "ste_v2v3_men_younger", "op": ">=", "value": 250, "unit": "uV", "source": "UDMI-2018"}]}
    d = plots.st_plot_data(evidence).set_index("lead")
    assert d.loc["V2", "cut_uv"] == 250 and d.loc["V2", "cut_key"] == "ste_v2v3_men_younger"


def test_leads_are_grouped_by_territory_and_a_group_without_a_fired_rule_has_no_line():
    evidence = st_evidence({"II": 150, "III": 150, "aVF": 150}, sex="M", age_years=60.0)
    d = plots.st_plot_data(evidence)
    assert list(d["lead"][:3]) == ["II", "III", "aVF"] and set(d["group"][:3]) == {"inferior"}
    by_lead = d.set_index("lead")
    assert by_lead.loc["II", "cut_uv"] == 100 and by_lead.loc["I", "cut_uv"] == 100   # ste_general fired
    # No V2-V3 lead met its cut point, so the evidence names none: unknown, not a guess.
    assert math.isnan(by_lead.loc["V2", "cut_uv"]) and pd.isna(by_lead.loc["V2", "cut_key"])
    groups = list(dict.fromkeys(d["group"]))
    assert groups == [g for g, _ in plots.ST_GROUPS if g in groups]


def test_the_prior_ecg_is_beside_each_lead_and_unknown_without_it():
    evidence = st_evidence({"II": 150, "III": 150, "aVF": 150})
    without = plots.st_plot_data(evidence)
    assert without["prior_st_uv"].isna().all()
    with_prior = plots.st_plot_data(evidence, {"II": 20.0, "III": -10.0}).set_index("lead")
    assert with_prior.loc["II", "prior_st_uv"] == 20 and with_prior.loc["III", "prior_st_uv"] == -10
    assert math.isnan(with_prior.loc["aVF", "prior_st_uv"])


def test_a_depression_finding_draws_its_fired_depression_threshold():
    evidence = st_evidence({"V4": -120, "V5": -120, "V6": -120})
    rule = plots.st_depression_rule(evidence)
    assert rule is not None and rule["value"] == -50 and rule["key"] == "std_alone"   # UDMI-2018 0.5 mm


def test_lab_data_without_a_lake_are_the_aligned_results_hours_from_the_ecg():
    row = ecg_rows(k_mmol_l=6.8, k_offset_min=-90.0, k_prev_mmol_l=5.1, k_prev_offset_min=-1500.0).iloc[0].to_dict()
    d = plots.lab_plot_data(row, row["acquired_at"])
    k = d[d["analyte"] == "potassium"]
    assert list(k["offset_h"]) == [-25.0, -1.5] and list(k["value"]) == [5.1, 6.8]
    assert set(d["origin"]) == {"aligned"} and set(d["analyte"]) == {"potassium", "magnesium", "calcium"}


def test_lab_data_from_the_lake_keep_only_the_72_hours_and_the_three_analytes():
    at = pd.Timestamp("2026-11-29 12:00", tz="UTC")
    lab = pd.DataFrame({"analyte": ["2823-3", "2823-3", "2823-3", "2951-2"],
                        "collected_at": [at - pd.Timedelta(hours=37), at - pd.Timedelta(hours=35), at + pd.Timedelta(hours=2), at],
                        "value": [4.0, 5.9, 6.6, 140.0], "unit": ["mmol/L"] * 4,
                        "hemolyzed": pd.array([False, True, None, False], dtype="boolean")})
    d = plots.lab_plot_data(None, at, lab, {"2823-3": "potassium", "2951-2": "sodium"})
    assert list(d["value"]) == [5.9, 6.6] and list(d["offset_h"]) == [-35.0, 2.0]
    assert list(d["hemolyzed"]) == [True, None]


def test_potassium_bands_are_the_rules_the_night_ran_under():
    bands = plots.potassium_bands(load_rules()["hyperkalemia"])
    # UKKA-2020: mild >= 5.5, moderate >= 6.0, severe >= 6.5 mmol/L (screens/rules.toml).
    assert [(b["key"], b["value"]) for b in bands] == [("k_mild", 5.5), ("k_moderate", 6), ("k_severe", 6.5)]


def test_qtc_points_and_the_sex_specific_limit_come_from_the_screen_and_evidence():
    at = pd.Timestamp("2026-11-29 12:00", tz="UTC")
    crit = pd.DataFrame({"ecg_id": ["e2", "e1"], "acquired_at": [at, at - pd.Timedelta(hours=6)],
                         "qtc_ms": [512.0, 470.0], "qtc_limit_ms": [460.0, 460.0], "sex": ["F", "F"]})
    evidence = {"values": {"qtc_limit_ms": 460, "sex": "F", "prior_qtc_ms": 440.0},
                "rules": [{"key": "qtc_high_risk", "op": ">", "value": 500, "unit": "ms", "source": "AHA-2010-TDP"}]}
    d, limits = plots.qtc_plot_data(evidence, "e2", crit, "e0", at - pd.Timedelta(days=3))
    assert list(d["ecg_id"]) == ["e0", "e1", "e2"] and list(d["this_ecg"]) == [False, False, True]
    assert list(d["origin"]) == ["evidence", "criteria", "criteria"]
    assert limits["limit_ms"] == 460 and limits["high_risk"]["value"] == 500


def test_qtc_limit_of_another_screens_item_is_the_long_qt_rows_own():
    at = pd.Timestamp("2026-11-29 12:00", tz="UTC")
    crit = pd.DataFrame({"ecg_id": ["e1"], "acquired_at": [at], "qtc_ms": [430.0], "qtc_limit_ms": [450.0], "sex": ["M"]})
    _, limits = plots.qtc_plot_data({}, "e1", crit)
    assert limits["limit_ms"] == 450 and limits["sex"] == "M" and limits["high_risk"] is None


def test_intervals_against_the_prior_say_unknown_as_nan():
    row = ecg_rows(heart_rate_bpm=50.0, pr_ms=240.0, qrs_ms=130.0, prior_pr_ms=180.0).iloc[0].to_dict()
    d = plots.interval_plot_data(row).set_index("measure")
    assert d.loc["pr_ms", "this_ecg"] == 240 and d.loc["pr_ms", "prior_ecg"] == 180
    assert math.isnan(d.loc["qrs_ms", "prior_ecg"])


def test_svg_drawings_are_self_contained():
    evidence = st_evidence({"V2": 300, "V3": 300}, sex="F", age_years=35.0)
    svg = plots.svg_st(plots.st_plot_data(evidence), None)
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg
    # Nothing fetched: no link or style import to another address (namespace URIs are names only).
    assert 'href="http' not in svg and "url(http" not in svg and "@import" not in svg
