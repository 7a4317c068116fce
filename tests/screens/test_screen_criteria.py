"""Threshold semantics and the rule loader (screens/criteria.py, screens/rules.toml)."""

import math

import numpy as np
import pandas as pd
import pytest

from cardiosieve.screens.criteria import Threshold, load_rules


@pytest.mark.parametrize(
    "op, x, expected",
    [
        # "above 500" and "500 or more" are different rules (STYLE.md); boundary exactly at 500.
        (">", 500.0, False), (">", 500.1, True), (">=", 500.0, True), (">=", 499.9, False),
        ("<", 3.5, False), ("<", 3.49, True), ("<=", 3.5, True), ("<=", 3.51, False),
    ],
)
def test_threshold_operator_at_and_either_side_of_its_value(op, x, expected):
    th = Threshold("t", op, 500.0 if op.startswith(">") else 3.5, "u", "LOCAL")
    assert th.met(x) is expected


def test_threshold_met_is_vectorised_keeps_series_index_and_missing_never_meets():
    th = Threshold("qtc_high_risk", ">", 500, "ms", "AHA-2010-TDP")
    s = pd.Series([499.0, 501.0, np.nan], index=[10, 20, 30])
    out = th.met(s)
    assert out.index.tolist() == [10, 20, 30] and out.tolist() == [False, True, False]
    assert th.met(np.array([600.0, np.nan])).tolist() == [True, False]
    assert th.met(pd.Series([600, pd.NA], dtype="Int64")).tolist() == [True, False]


def test_unknown_operator_is_refused():
    with pytest.raises(ValueError, match="operator"):
        Threshold("x", "=>", 1, "u", "LOCAL")


def test_shipped_rules_have_versions_and_every_source_is_cited():
    rules = load_rules()
    assert rules.versions() == {
        "hyperkalemia": "hyperkalemia/1.1.0",
        "long_qt": "long_qt/1.1.0",
        "st_deviation": "st_deviation/2.0.0",
    }
    for screen in rules.screens.values():
        for th in screen.thresholds.values():
            assert th.source in rules.sources and len(rules.sources[th.source]) > 20


def test_shipped_values_match_the_published_criteria():
    r = load_rules()
    # UKKA-2020 bands; AHA-2009-IV / AHA-2010-TDP limits; UDMI-2018 cut points.
    assert [r["hyperkalemia"][k].value for k in ("k_mild", "k_moderate", "k_severe")] == [5.5, 6.0, 6.5]
    assert (r["long_qt"]["qtc_prolonged_m"].op, r["long_qt"]["qtc_prolonged_m"].value) == (">=", 450)
    assert (r["long_qt"]["qtc_prolonged_f"].op, r["long_qt"]["qtc_prolonged_f"].value) == (">=", 460)
    assert (r["long_qt"]["qtc_high_risk"].op, r["long_qt"]["qtc_high_risk"].value) == (">", 500)
    assert (r["long_qt"]["qtc_rise"].op, r["long_qt"]["qtc_rise"].value) == (">", 60)
    st = r["st_deviation"]
    assert [st[k].value for k in ("ste_general", "ste_v2v3_men_older", "ste_v2v3_men_younger", "ste_v2v3_women")] == [
        100, 200, 250, 150]
    assert r["long_qt"].setting("qtc_formula") == "fridericia"


def test_site_override_changes_value_source_and_version_but_not_operator():
    rules = load_rules({"long_qt": {"qtc_high_risk": 480}}, source_name="site.toml")
    th = rules["long_qt"]["qtc_high_risk"]
    assert (th.op, th.value, th.source) == (">", 480.0, "site: site.toml")
    assert rules["long_qt"].version.startswith("long_qt/1.1.0+site.")
    # Other screens keep their published version.
    assert rules["hyperkalemia"].version == "hyperkalemia/1.1.0"


def test_different_overrides_give_different_versions_and_same_overrides_the_same():
    a = load_rules({"long_qt": {"qtc_high_risk": 480}})["long_qt"].version
    b = load_rules({"long_qt": {"qtc_high_risk": 490}})["long_qt"].version
    c = load_rules({"long_qt": {"qtc_high_risk": 480}})["long_qt"].version
    assert a != b and a == c


def test_setting_override_and_its_validation():
    assert load_rules({"long_qt": {"qtc_formula": "bazett"}})["long_qt"].setting("qtc_formula") == "bazett"
    with pytest.raises(ValueError, match="qtc_formula"):
        load_rules({"long_qt": {"qtc_formula": "rautaharju"}})
    with pytest.raises(ValueError, match="report_not_evaluable"):
        load_rules({"st_deviation": {"report_not_evaluable": "yes"}})


@pytest.mark.parametrize(
    "overrides, named",
    [
        ({"long_qt": {"qtc_hi_risk": 480}}, "qtc_hi_risk"),
        ({"long-qt": {"qtc_high_risk": 480}}, "long-qt"),
    ],
)
def test_unknown_override_key_or_screen_raises_naming_it(overrides, named):
    with pytest.raises(ValueError, match=named):
        load_rules(overrides)


def test_threshold_override_must_be_a_number():
    with pytest.raises(ValueError, match="qtc_high_risk"):
        load_rules({"long_qt": {"qtc_high_risk": "480"}})
    with pytest.raises(ValueError, match="qtc_high_risk"):
        load_rules({"long_qt": {"qtc_high_risk": True}})


def test_as_dict_is_the_evidence_shape():
    d = load_rules()["long_qt"]["qtc_high_risk"].as_dict()
    assert d == {"key": "qtc_high_risk", "op": ">", "value": 500, "unit": "ms", "source": "AHA-2010-TDP"}
    assert not math.isnan(d["value"])
