"""Hyperkalemia screen: UKKA-2020 bands, ECG signs, haemolysis, missing potassium."""

import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from screens.criteria import load_rules
from screens.hyperkalemia import CAVEAT_HEMOLYZED, CAVEAT_NO_K, screen_hyperkalemia
from screen_builders import ecg_rows, lead_rows, leads_of, no_leads

RULES = load_rules()

# A clear ECG sign for "with signs" rows: QRS 150 ms (>= 120 ms, PRACTICE).
SIGN = {"qrs_ms": 150.0}


def run(leads=None, **row):
    return screen_hyperkalemia(ecg_rows(**row), lead_rows() if leads is None else leads, RULES)


def tier_of(**row):
    out = run(**row)
    return None if out.empty else int(out["tier"].iloc[0])


@pytest.mark.parametrize(
    "k, signs, tier",
    [
        # UKKA-2020 bands: mild 5.5-5.9, moderate 6.0-6.4, severe >= 6.5 mmol/L; tiers per the issue.
        (5.4, False, None), (5.5, False, 4), (5.9, False, 4),
        (5.4, True, None), (5.5, True, 3), (5.9, True, 3),
        (5.99, False, 4), (6.0, False, 3), (6.4, False, 3),
        (6.0, True, 2), (6.4, True, 2),
        (6.49, False, 3), (6.5, False, 2), (8.0, False, 2),
        (6.5, True, 1), (8.0, True, 1),
    ],
)
def test_tier_by_potassium_band_and_ecg_signs(k, signs, tier):
    row = {"k_mmol_l": k, **(SIGN if signs else {})}
    assert tier_of(**row) == tier


@pytest.mark.parametrize(
    "row, leads_kw, sign",
    [
        # Peaked T: precordial >= 1000 uV, limb >= 600 uV (PRACTICE, issue words ">=").
        ({}, {"t_amp_uv": {"V3": 1000}}, "peaked_t"),
        ({}, {"t_amp_uv": {"II": 600}}, "peaked_t"),
        # QRS >= 120 ms (PRACTICE); PR > 200 ms (PRACTICE); HR < 50 bpm (PRACTICE).
        ({"qrs_ms": 120.0}, {}, "qrs"),
        ({"pr_ms": 201.0}, {}, "pr"),
        ({"heart_rate_bpm": 49.0}, {}, "brady"),
        # Flat P in II: |P| < 50 uV (LOCAL).
        ({}, {"p_amp_uv": {"II": 49}}, "p_flat"),
        # Changes against the prior ECG (LOCAL): QRS +20 ms, PR +40 ms.
        ({"qrs_ms": 110.0, "prior_ecg_id": "ecg-0", "prior_qrs_ms": 90.0}, {}, "qrs"),
        ({"pr_ms": 190.0, "prior_ecg_id": "ecg-0", "prior_pr_ms": 150.0}, {}, "pr"),
    ],
)
def test_each_sign_is_recorded_separately_at_its_cut_point(row, leads_kw, sign):
    leads = leads_of(lead_rows("ecg-1", **leads_kw), lead_rows("ecg-0"))
    out = run(leads=leads, k_mmol_l=6.7, **row)
    signs = json.loads(out["evidence"].iloc[0])["signs"]
    assert signs[sign] is True
    assert [k for k, v in signs.items() if v] == [sign]
    assert int(out["tier"].iloc[0]) == 1  # severe K with a sign


@pytest.mark.parametrize(
    "row, leads_kw",
    [
        ({}, {"t_amp_uv": {"V3": 999}}),
        ({}, {"t_amp_uv": {"II": 599}}),
        ({"qrs_ms": 119.0}, {}),
        ({"pr_ms": 200.0}, {}),
        ({"heart_rate_bpm": 50.0}, {}),
        ({}, {"p_amp_uv": {"II": 50}}),
        ({"qrs_ms": 109.0, "prior_ecg_id": "ecg-0", "prior_qrs_ms": 90.0}, {}),
        ({"pr_ms": 189.0, "prior_ecg_id": "ecg-0", "prior_pr_ms": 150.0}, {}),
    ],
)
def test_just_below_each_sign_cut_point_no_sign_is_recorded(row, leads_kw):
    leads = leads_of(lead_rows("ecg-1", **leads_kw), lead_rows("ecg-0"))
    out = run(leads=leads, k_mmol_l=6.7, **row)
    signs = json.loads(out["evidence"].iloc[0])["signs"]
    assert not any(signs.values())
    assert int(out["tier"].iloc[0]) == 2  # severe K alone


def test_t_growth_of_50_percent_against_the_prior_in_the_same_lead_is_a_sign():
    # LOCAL: T +50 % in the same lead, prior T >= 100 uV. V2 450 -> 675 uV is exactly +50 %.
    grown = leads_of(lead_rows("ecg-1", t_amp_uv={"V2": 675}), lead_rows("ecg-0"))
    out = run(leads=grown, k_mmol_l=6.0, prior_ecg_id="ecg-0")
    ev = json.loads(out["evidence"].iloc[0])
    assert ev["signs"]["peaked_t"] is True and ev["values"]["t_grown_leads"] == ["V2"]
    assert "T grown up to 50 %" in out["summary"].iloc[0]
    not_grown = leads_of(lead_rows("ecg-1", t_amp_uv={"V2": 670}), lead_rows("ecg-0"))
    out = run(leads=not_grown, k_mmol_l=6.0, prior_ecg_id="ecg-0")
    assert json.loads(out["evidence"].iloc[0])["signs"]["peaked_t"] is False


def test_tiny_prior_t_does_not_count_as_growth():
    # 40 -> 100 uV is +150 % but the prior T is below the 100 uV floor (LOCAL).
    leads = leads_of(lead_rows("ecg-1", t_amp_uv={"III": 100}), lead_rows("ecg-0", t_amp_uv={"III": 40}))
    out = run(leads=leads, k_mmol_l=6.0, prior_ecg_id="ecg-0")
    assert json.loads(out["evidence"].iloc[0])["signs"]["peaked_t"] is False


def test_summary_gives_key_values_with_units():
    tall_t = {"V2": 1300, "V3": 1250, "V4": 1100}
    # The prior already had these T waves, so only the peaking (not growth) shows.
    leads = leads_of(lead_rows("ecg-1", t_amp_uv=tall_t), lead_rows("ecg-0", t_amp_uv=tall_t))
    out = run(leads=leads, k_mmol_l=7.1, k_offset_min=-55.0, qrs_ms=150.0, prior_ecg_id="ecg-0", prior_qrs_ms=92.0)
    assert out["summary"].iloc[0] == (
        "K 7.1 mmol/L (severe) collected 55 min before the ECG; QRS 150 ms (prior 92 ms); T up to 1.3 mV in V2-V4"
    )
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["lab_confirmed"] == 1 and parts["lab_gap_min"] == 55 and parts["prior_present"] == 1
    assert parts["sign_count"] == 2


def test_high_potassium_with_normal_ecg_is_still_a_finding():
    # MONTAGUE-2008: typical ECG changes in only a minority; a high K alone is a finding.
    out = run(k_mmol_l=6.8)
    assert len(out) == 1 and "the ECG is insensitive" in out["summary"].iloc[0]


@pytest.mark.parametrize("k", [5.6, 6.2, 7.0])
def test_haemolysed_ranks_below_same_value_unless_signs(k):
    plain = run(k_mmol_l=k)
    hemo = run(k_mmol_l=k, k_hemolyzed=True)
    t_plain, t_hemo = int(plain["tier"].iloc[0]), int(hemo["tier"].iloc[0])
    s_plain = json.loads(plain["score_parts"].iloc[0])["severity"]
    s_hemo = json.loads(hemo["score_parts"].iloc[0])["severity"]
    assert (t_hemo, s_hemo) > (t_plain, -s_plain) or (t_hemo == t_plain and s_hemo < s_plain)
    assert (t_hemo > t_plain) or (k < 6.0 and t_hemo == t_plain == 4 and s_hemo < s_plain)
    assert CAVEAT_HEMOLYZED in json.loads(hemo["caveats"].iloc[0])
    assert "repeat" in CAVEAT_HEMOLYZED and "aemolysed" in CAVEAT_HEMOLYZED
    assert json.loads(hemo["score_parts"].iloc[0])["lab_confirmed"] == 0
    # With ECG signs a haemolysed sample keeps its tier.
    with_signs = run(k_mmol_l=k, k_hemolyzed=True, **SIGN)
    assert int(with_signs["tier"].iloc[0]) == int(run(k_mmol_l=k, **SIGN)["tier"].iloc[0])


def test_signs_without_potassium_say_none_was_measured_and_suggest_one():
    out = run(k_mmol_l=np.nan, k_offset_min=np.nan, k_result_id=None, qrs_ms=150.0)
    assert int(out["tier"].iloc[0]) == 4
    assert out["summary"].iloc[0].startswith("No potassium in the lab window")
    assert "suggest measuring potassium" in out["summary"].iloc[0]
    assert CAVEAT_NO_K in json.loads(out["caveats"].iloc[0])
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["lab_confirmed"] == 0 and parts["lab_gap_min"] is None
    # Two distinct signs lift it to tier 3 (setting no_k_signs_for_tier3 = 2, LOCAL).
    two = run(k_mmol_l=np.nan, qrs_ms=150.0, heart_rate_bpm=45.0)
    assert int(two["tier"].iloc[0]) == 3


def test_absent_p_without_a_pr_interval_alone_needs_a_potassium_to_count():
    # No P and no PR is how carts report atrial fibrillation (common practice); without a
    # potassium in the window it alone raises nothing (local choice in screens/hyperkalemia.py) ...
    flat_p = lead_rows(p_amp_uv={"II": 0.0})
    assert run(flat_p, k_mmol_l=np.nan, k_offset_min=np.nan, k_result_id=None, pr_ms=np.nan).empty
    # ... with a PR interval it is a flattened P, a sign (tier 4 with no potassium, as above) ...
    assert int(run(flat_p, k_mmol_l=np.nan, k_offset_min=np.nan, k_result_id=None)["tier"].iloc[0]) == 4
    # ... and with a severe potassium (UKKA-2020: >= 6.5) it counts as a sign: tier 1.
    assert int(run(flat_p, k_mmol_l=6.8, pr_ms=np.nan)["tier"].iloc[0]) == 1


def test_no_potassium_and_no_signs_is_no_finding():
    assert run(k_mmol_l=np.nan).empty


def test_missing_leads_leave_signs_visible_as_not_evaluable():
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.6), no_leads(), RULES)
    ev = json.loads(out["evidence"].iloc[0])
    assert ev["signs"]["peaked_t"] is None and ev["signs"]["p_flat"] is None
    assert any("Not evaluable" in c and "peaked_t" in c for c in json.loads(out["caveats"].iloc[0]))


def test_site_override_of_a_band_moves_the_tier():
    rules = load_rules({"hyperkalemia": {"k_severe": 6.2}})
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.3), lead_rows(), rules)
    assert int(out["tier"].iloc[0]) == 2
    ev = json.loads(out["evidence"].iloc[0])
    assert ev["rules"][0]["source"] == "site: site" and ev["rule_version"].startswith("hyperkalemia/1.0.1+site.")


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    cases=st.lists(
        st.tuples(st.floats(3.0, 9.0), st.floats(0.0, 3.0), st.booleans(), st.sampled_from([90.0, 125.0]),
                  st.sampled_from([70.0, 45.0])),
        min_size=10, max_size=10,
    )
)
def test_a_higher_potassium_never_lowers_the_tier(cases):
    # Property from the issue: raising K, all else equal, never gives a less urgent tier.
    # Rows 2i and 2i+1 differ only in K (K and K + dK); ten pairs per screen call.
    rows = [c for k, dk, hemo, qrs, hr in cases for c in ((k, hemo, qrs, hr), (k + dk, hemo, qrs, hr))]
    aligned = ecg_rows(
        len(rows), k_mmol_l=[r[0] for r in rows], k_hemolyzed=[r[1] for r in rows],
        qrs_ms=[r[2] for r in rows], heart_rate_bpm=[r[3] for r in rows],
    )
    leads = leads_of(*[lead_rows(f"ecg-{i + 1}") for i in range(len(rows))])
    out = screen_hyperkalemia(aligned, leads, RULES)
    tiers = dict(zip(out["ecg_id"], out["tier"]))
    for i in range(0, len(rows), 2):
        assert tiers.get(f"ecg-{i + 2}", 5) <= tiers.get(f"ecg-{i + 1}", 5)


def test_potassium_lowering_treatment_and_trend_are_reported():
    out = run(k_mmol_l=6.1, k_prev_mmol_l=5.2, k_change_mmol_l=0.9, k_lowering_24h=True)
    assert "previous 5.2" in out["summary"].iloc[0]
    assert json.loads(out["score_parts"].iloc[0])["trend"] == pytest.approx(0.9)
    assert any("Potassium-lowering" in c for c in json.loads(out["caveats"].iloc[0]))
