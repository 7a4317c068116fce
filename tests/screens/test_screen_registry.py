"""Every registered screen through the same checks: columns, purity, empty in/out, reruns."""

import json

import pandas as pd
import pytest
from pandas.testing import assert_frame_equal

from cardiosieve.screens import FINDING_COLUMNS, SCORE_PART_KEYS, SCREENS, empty_findings, load_rules, run_screens
from screen_builders import ecg_rows, lead_rows, leads_of, no_leads

TERRITORY_WORDS = {"inferior", "lateral", "anterior", "septal", "posterior", "right_ventricular"}


def busy_night():
    """Five ECGs that between them trip every screen, plus one normal ECG and a prior."""
    aligned = ecg_rows(
        6,
        k_mmol_l=[7.1, 4.0, 4.0, 5.8, 4.1, 4.2],
        k_hemolyzed=[False, False, False, True, False, False],
        qt_ms=[400, 530, 400, 400, 470, 400],
        sex=["M", "F", "M", "F", "M", "M"],
        qrs_ms=[150, 90, 90, 90, 90, 90],
        prior_ecg_id=["ecg-0", None, None, None, None, None],
        prior_qrs_ms=[92, float("nan"), float("nan"), float("nan"), float("nan"), float("nan")],
        trop_max_ratio=[float("nan"), float("nan"), 4.0, float("nan"), float("nan"), float("nan")],
    )
    leads = leads_of(
        lead_rows("ecg-0"),
        lead_rows("ecg-1", t_amp_uv={"V2": 1300, "V3": 1200, "V4": 1100}, r_amp_uv={"V1": 900}, s_amp_uv={"V1": -200}),
        lead_rows("ecg-2"),
        lead_rows("ecg-3", st_j_uv={"V2": 300, "V3": 300, "V4": 200, "II": -100, "aVF": -100}),
        lead_rows("ecg-4"),
        lead_rows("ecg-5"),
        lead_rows("ecg-6"),
    )
    return aligned, leads


@pytest.fixture(params=sorted(SCREENS))
def screen(request):
    return request.param, SCREENS[request.param]


def test_findings_have_the_contract_columns_and_types(screen):
    name, fn = screen
    aligned, leads = busy_night()
    out = fn(aligned, leads, load_rules())
    assert list(out.columns) == FINDING_COLUMNS
    assert len(out) > 0, f"{name} found nothing on the busy night"
    assert (out["screen"] == name).all()
    assert str(out["acquired_at"].dtype) == "datetime64[us, UTC]" and str(out["tier"].dtype) == "int64"
    assert out["tier"].between(1, 4).all()
    assert out["summary"].str.len().gt(0).all() and not out["summary"].str.contains("\n").any()
    for _, row in out.iterrows():
        parts = json.loads(row["score_parts"])
        assert list(parts)[: len(SCORE_PART_KEYS)] == list(SCORE_PART_KEYS)
        assert 0.0 <= parts["severity"] <= 1.0 and parts["lab_confirmed"] in (0, 1)
        evidence = json.loads(row["evidence"])
        assert evidence["rule_version"] == row["rule_version"] == load_rules()[name].version
        assert isinstance(evidence["values"], dict)
        assert all(set(r) == {"key", "op", "value", "unit", "source"} for r in evidence["rules"])
        assert isinstance(json.loads(row["caveats"]), list)
        words = [w for w in row["territories"].split(",") if w]
        assert set(words) <= TERRITORY_WORDS
    assert out["ecg_id"].is_unique  # one finding per ECG per screen


def test_inputs_are_left_unchanged(screen):
    _, fn = screen
    aligned, leads = busy_night()
    a0, l0 = aligned.copy(deep=True), leads.copy(deep=True)
    fn(aligned, leads, load_rules())
    assert_frame_equal(aligned, a0)
    assert_frame_equal(leads, l0)


def test_empty_in_gives_empty_out(screen):
    _, fn = screen
    aligned, leads = busy_night()
    out = fn(aligned.iloc[0:0], leads.iloc[0:0], load_rules())
    assert_frame_equal(out, empty_findings())
    assert_frame_equal(fn(pd.DataFrame(), no_leads(), load_rules()), empty_findings())


def test_reruns_are_identical(screen):
    _, fn = screen
    aligned, leads = busy_night()
    assert_frame_equal(fn(aligned, leads, load_rules()), fn(aligned, leads, load_rules()))


def test_normal_ecg_with_normal_labs_gives_no_finding(screen):
    _, fn = screen
    assert len(fn(ecg_rows(), lead_rows(), load_rules())) == 0


def test_row_order_does_not_change_the_findings(screen):
    _, fn = screen
    aligned, leads = busy_night()
    forward = fn(aligned, leads, load_rules()).sort_values("ecg_id", ignore_index=True)
    backward = fn(aligned.iloc[::-1], leads.iloc[::-1], load_rules()).sort_values("ecg_id", ignore_index=True)
    assert_frame_equal(forward, backward)


def test_missing_required_column_is_named_in_the_error(screen):
    _, fn = screen
    aligned, leads = busy_night()
    with pytest.raises(KeyError, match="ecg_id"):
        fn(aligned.drop(columns=["ecg_id"]), leads, load_rules())


def test_run_screens_concatenates_all_screens_in_registry_order():
    aligned, leads = busy_night()
    out = run_screens(aligned, leads)
    assert list(out.columns) == FINDING_COLUMNS
    order = list(SCREENS)
    ranks = out["screen"].map(order.index)
    assert ranks.is_monotonic_increasing and set(out["screen"]) == set(SCREENS)
    assert_frame_equal(run_screens(ecg_rows(), lead_rows()), empty_findings())


def test_site_override_version_reaches_the_findings():
    aligned, leads = busy_night()
    rules = load_rules({"long_qt": {"qtc_high_risk": 480}}, source_name="site.toml")
    out = run_screens(aligned, leads, rules)
    qt = out[out["screen"] == "long_qt"]
    assert qt["rule_version"].str.startswith("long_qt/1.1.0+site.").all()
    assert (out.loc[out["screen"] != "long_qt", "rule_version"].str.contains(r"\+")).sum() == 0


# ---------------------------------------------------------------- one shape: the criterion table
def test_criterion_table_has_one_row_per_ecg_and_its_documented_columns(screen):
    # screens/_table.py: one row per aligned ECG, in order, each column documented in the
    # module docstring with its unit and source.
    import sys

    from cardiosieve.screens._table import ID_COLUMNS, SCORE_COLUMNS, documented_columns

    name, fn = screen
    aligned, leads = busy_night()
    _, table = fn(aligned, leads, load_rules(), with_criteria=True)
    assert table["ecg_id"].tolist() == aligned["ecg_id"].tolist()
    documented = documented_columns(sys.modules[fn.__module__].__doc__)
    assert list(table.columns) == list(documented), f"{name}: criterion table and its docstring differ"
    assert set(ID_COLUMNS + SCORE_COLUMNS + ["tier"]) <= set(table.columns)
    assert all(unit and source for unit, source in documented.values())


def test_findings_are_the_flagged_rows_of_the_criterion_table(screen):
    # The text is built from the table: tiers agree, and every rule listed in the evidence
    # is one whose criterion column is true in that row (never re-evaluated).
    name, fn = screen
    aligned, leads = busy_night()
    found, table = fn(aligned, leads, load_rules(), with_criteria=True)
    flagged = table[table["tier"] < 5]
    assert flagged["ecg_id"].tolist() == found["ecg_id"].tolist()
    assert flagged["tier"].tolist() == found["tier"].tolist()
    module = __import__(fn.__module__, fromlist=["FIRED"])
    column_of = {}
    for key, column in module.FIRED:
        column_of.setdefault(key, []).append(column)
    for (_, row), evidence in zip(flagged.iterrows(), found["evidence"]):
        for rule in json.loads(evidence)["rules"]:
            assert any(bool(row[c]) for c in column_of[rule["key"]]), (name, rule["key"])


def test_run_screens_returns_every_criterion_table():
    aligned, leads = busy_night()
    findings, tables = run_screens(aligned, leads, load_rules(), with_criteria=True)
    assert sorted(tables) == sorted(SCREENS) and all(len(t) == len(aligned) for t in tables.values())
    assert_frame_equal(findings, run_screens(aligned, leads, load_rules()))
