"""Hyperkalemia screen: UKKA-2020 bands, ECG signs, haemolysis, missing or rejected potassium.

Sources named beside each check: UKKA-2020 (bands mild 5.5-5.9, moderate 6.0-6.4, severe >= 6.5
mmol/L, checked against secondary pages; ECG changes with hyperkalaemia an emergency, from
memory; repeat a haemolysed sample, from memory), MONTAGUE-2008 (the ECG is insensitive),
PRACTICE (common practice: sign cut points), LOCAL (cardiosieve's choices).
"""

import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cardiosieve.screens.criteria import load_rules
from cardiosieve.screens.hyperkalemia import (
    CAVEAT_HEMO_SIGNS,
    CAVEAT_HEMOLYZED,
    TIER_HEMOLYZED_SEVERE_FLOOR,
    screen_hyperkalemia,
)
from screen_builders import ecg_rows, lead_rows, leads_of, no_leads

RULES = load_rules()

# A clear ECG sign for "with signs" rows: QRS 150 ms (>= 120 ms, PRACTICE).
SIGN = {"qrs_ms": 150.0}


def run(leads=None, **row):
    return screen_hyperkalemia(ecg_rows(**row), lead_rows() if leads is None else leads, RULES)


def tier_of(**row):
    out = run(**row)
    return None if out.empty else int(out["tier"].iloc[0])


def with_columns(aligned, **extra):
    """The aligned rows plus optional columns the builders do not know (k_rejected_reason, lab_*_h)."""
    out = aligned.copy()
    for name, value in extra.items():
        out[name] = pd.Series(value if isinstance(value, list) else [value] * len(out), dtype=(
            "str" if name == "k_rejected_reason" else "float64"))
    return out


def caveats(out, i=0):
    return json.loads(out["caveats"].iloc[i])


NO_K = {"k_mmol_l": np.nan, "k_offset_min": np.nan, "k_result_id": None}


@pytest.mark.parametrize(
    "k, signs, tier",
    [
        # UKKA-2020 bands: mild 5.5-5.9, moderate 6.0-6.4, severe >= 6.5 mmol/L.
        (5.4, False, None), (5.5, False, 4), (5.9, False, 4),
        (5.4, True, None), (5.5, True, 3), (5.9, True, 3),
        (5.99, False, 4), (6.0, False, 3), (6.4, False, 3),
        # UKKA-2020 (from memory): ECG changes with hyperkalaemia are an emergency, so K >= 6.0 with
        # signs is tier 1 (before 1.1.0 moderate with signs was tier 2); 5.99 with signs is mild: 3.
        (5.99, True, 3), (6.0, True, 1), (6.4, True, 1),
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
        # Peaked T: precordial >= 1000 uV, limb >= 600 uV (PRACTICE; ">=" here, one calibration step
        # more sensitive than the textbook's ">").
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


def test_moderate_potassium_with_several_signs_and_missing_inputs():
    # UKKA-2020 moderate 6.2 with QRS 150 (PRACTICE) and HR 45 (PRACTICE), no prior ECG and no
    # lead rows: tier 1 (ECG changes with hyperkalaemia, from memory); the gaps stay visible.
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.2, qrs_ms=150.0, heart_rate_bpm=45.0), no_leads(), RULES)
    assert int(out["tier"].iloc[0]) == 1
    ev = json.loads(out["evidence"].iloc[0])
    assert ev["signs"] == {"peaked_t": None, "qrs": True, "pr": False, "p_flat": None, "brady": True}
    cav = caveats(out)
    assert any(c.startswith("No prior ECG") for c in cav)
    assert any("Not evaluable" in c and "peaked_t" in c and "p_flat" in c for c in cav)


def rank(out):
    return int(out["tier"].iloc[0]), json.loads(out["score_parts"].iloc[0])["severity"]


@pytest.mark.parametrize(
    "k, signs, tier_plain, tier_hemo",
    [
        # Haemolysis (UKKA-2020, from memory: repeat the sample; the value is unreliable, not
        # reassuring). Without signs: mild stays 4 (capped), moderate 3 -> 4, severe keeps 2.
        (5.5, False, 4, 4), (5.9, False, 4, 4),
        (6.0, False, 3, 4), (6.49, False, 3, 4),
        (6.5, False, 2, 2), (7.0, False, 2, 2), (9.0, False, 2, 2),
        # With ECG signs the haemolysed result keeps its tier (mild 3; K >= 6.0 tier 1).
        (5.6, True, 3, 3), (6.2, True, 1, 1), (7.0, True, 1, 1),
    ],
)
def test_haemolysed_result_by_band_and_signs(k, signs, tier_plain, tier_hemo):
    extra = SIGN if signs else {}
    plain, hemo = run(k_mmol_l=k, **extra), run(k_mmol_l=k, k_hemolyzed=True, **extra)
    (t_plain, s_plain), (t_hemo, s_hemo) = rank(plain), rank(hemo)
    assert (t_plain, t_hemo) == (tier_plain, tier_hemo)
    if signs:
        assert s_hemo == pytest.approx(s_plain)
        assert CAVEAT_HEMO_SIGNS in caveats(hemo)
    else:
        # Ranks below the same value unhaemolysed: a lower tier, or the same tier and half the severity.
        assert t_hemo > t_plain or s_hemo == pytest.approx(s_plain / 2)
    # Every haemolysed result says so and says to repeat the sample urgently (UKKA-2020, from memory).
    assert CAVEAT_HEMOLYZED in caveats(hemo)
    assert CAVEAT_HEMOLYZED.endswith("Repeat the sample urgently.")
    assert json.loads(hemo["score_parts"].iloc[0])["lab_confirmed"] == 0
    assert json.loads(hemo["score_parts"].iloc[0])["hemolyzed"] == 1


def test_haemolysed_severe_potassium_is_never_below_tier_2_and_says_why():
    # UKKA-2020 severe band >= 6.5 mmol/L; a haemolysed severe value stays tier 2 (LOCAL floor).
    out = run(k_mmol_l=7.2, k_hemolyzed=True)
    assert int(out["tier"].iloc[0]) == TIER_HEMOLYZED_SEVERE_FLOOR == 2
    assert "Ranked lower within tier 2 for haemolysis (no ECG sign); a potassium of 6.5 mmol/L or more " \
           "is never ranked below tier 2 for haemolysis." in caveats(out)
    assert "haemolysed" in out["summary"].iloc[0]
    # A moderate haemolysed value drops one tier and says so; a mild one drops within tier 4.
    assert "Ranked one tier lower for haemolysis (no ECG sign, potassium below 6.5 mmol/L)." in caveats(
        run(k_mmol_l=6.2, k_hemolyzed=True))
    assert "Ranked lower within tier 4 for haemolysis (no ECG sign)." in caveats(run(k_mmol_l=5.7, k_hemolyzed=True))


def test_unknown_haemolysis_is_treated_as_not_haemolysed():
    # k_hemolyzed null (the lab did not say): no demotion and no haemolysis caveat (local choice).
    out = run(k_mmol_l=6.2, k_hemolyzed=pd.NA)
    assert int(out["tier"].iloc[0]) == 3 and CAVEAT_HEMOLYZED not in caveats(out)


def test_signs_without_potassium_say_what_was_seen_and_what_the_rank_did():
    out = run(qrs_ms=150.0, **NO_K)
    assert int(out["tier"].iloc[0]) == 4
    # Without the window columns the text names no hours (it cannot know the window applied).
    assert out["summary"].iloc[0] == "No potassium in the lab window; QRS 150 ms; ECG signs ranked without a laboratory value"
    assert "No potassium in the lab window: ECG signs ranked without a laboratory value." in caveats(out)
    for hedge in ("suggest", "consider"):
        assert hedge not in out["summary"].iloc[0] and not any(hedge in c for c in caveats(out))
    parts = json.loads(out["score_parts"].iloc[0])
    assert parts["lab_confirmed"] == 0 and parts["lab_gap_min"] is None
    # Two distinct signs lift it to tier 3 (setting no_k_signs_for_tier3 = 2, LOCAL).
    two = run(qrs_ms=150.0, heart_rate_bpm=45.0, **NO_K)
    assert int(two["tier"].iloc[0]) == 3


@pytest.mark.parametrize("before_h, after_h, words", [(24.0, 6.0, "24 h before to 6 h after"),
                                                      (12.0, 2.5, "12 h before to 2.5 h after")])
def test_no_potassium_text_names_the_window_applied(before_h, after_h, words):
    # The lab window is the pipeline's setting (default 24 h / 6 h; a site may change it):
    # the text is formatted from the columns the aligned table carries, never from a constant.
    aligned = with_columns(ecg_rows(qrs_ms=150.0, **NO_K), lab_before_h=before_h, lab_after_h=after_h)
    out = screen_hyperkalemia(aligned, lead_rows(), RULES)
    assert out["summary"].iloc[0].startswith(f"No potassium in the lab window ({words} the ECG); QRS 150 ms")
    assert f"No potassium in the lab window ({words} the ECG): ECG signs ranked without a laboratory value." in caveats(out)


# --------------------------------------------------------------------------- H3: rejected potassium

REJECTED = "quality:lab_potassium_plausible"


@pytest.mark.parametrize(
    "row, tier",
    [
        # A rejected potassium ranks as no potassium: one sign tier 4, two signs tier 3 (LOCAL setting).
        ({"qrs_ms": 150.0}, 4),
        ({"qrs_ms": 150.0, "heart_rate_bpm": 45.0}, 3),
        # No sign: no finding, as with no potassium.
        ({}, None),
    ],
)
def test_rejected_potassium_is_named_with_its_reason_not_called_unmeasured(row, tier):
    aligned = with_columns(ecg_rows(**NO_K, **row), k_rejected_reason=REJECTED)
    out = screen_hyperkalemia(aligned, lead_rows(), RULES)
    if tier is None:
        assert out.empty
        return
    assert int(out["tier"].iloc[0]) == tier
    summary = out["summary"].iloc[0]
    assert summary.startswith(f"Potassium result rejected ({REJECTED}); QRS 150 ms")
    assert summary.endswith("ECG signs ranked without a laboratory value")
    assert "No potassium" not in summary and not any("No potassium" in c for c in caveats(out))
    assert any(f"was rejected by the data checks (reason {REJECTED})" in c for c in caveats(out))
    assert json.loads(out["evidence"].iloc[0])["values"]["k_rejected_reason"] == REJECTED
    assert json.loads(out["score_parts"].iloc[0])["lab_confirmed"] == 0


def test_rejected_reason_is_ignored_when_a_potassium_was_accepted_and_null_means_none():
    # The alignment fills k_rejected_reason only when no accepted potassium was found; if both come,
    # the accepted value decides (UKKA-2020 severe 6.8 alone: tier 2).
    aligned = with_columns(ecg_rows(2, k_mmol_l=[6.8, np.nan], qrs_ms=150.0), k_rejected_reason=[REJECTED, None])
    out = screen_hyperkalemia(aligned, lead_rows(), RULES).set_index("ecg_id")
    assert out.loc["ecg-1", "summary"].startswith("K 6.8 mmol/L (severe)")
    assert json.loads(out.loc["ecg-1", "evidence"])["values"]["k_rejected_reason"] is None
    assert out.loc["ecg-2", "summary"].startswith("No potassium in the lab window")


def test_rejected_potassium_text_names_the_window_when_known():
    aligned = with_columns(ecg_rows(qrs_ms=150.0, **NO_K), k_rejected_reason="impossible_value",
                           lab_before_h=24.0, lab_after_h=6.0)
    out = screen_hyperkalemia(aligned, lead_rows(), RULES)
    assert ("A potassium result in the lab window (24 h before to 6 h after the ECG) was rejected by the data "
            "checks (reason impossible_value) and not used") in caveats(out)[0]


def test_rejected_potassium_with_absent_p_and_no_pr_alone_raises_nothing():
    # As with no potassium: absent P without PR is how carts report AF (common practice), so alone
    # it raises nothing (local choice).
    aligned = with_columns(ecg_rows(pr_ms=np.nan, **NO_K), k_rejected_reason=REJECTED)
    assert screen_hyperkalemia(aligned, lead_rows(p_amp_uv={"II": 0.0}), RULES).empty


# --------------------------------------------------------------------------- H5: "no ECG sign" wording


def test_no_sign_wording_names_the_signs_not_assessed():
    # MONTAGUE-2008: the ECG is insensitive. All signs assessed: "no ECG sign".
    assert run(k_mmol_l=6.8)["summary"].iloc[0].endswith("; no ECG sign of hyperkalaemia (the ECG is insensitive)")
    # No lead rows: peaked T and flat P cannot be assessed, and the text says so.
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.8), no_leads(), RULES)
    assert out["summary"].iloc[0].endswith(
        "; no ECG sign of hyperkalaemia among those assessed (not assessable: peaked T, flat P; the ECG is insensitive)")
    # No PR and no leads: three signs not assessable.
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.8, pr_ms=np.nan), no_leads(), RULES)
    assert "(not assessable: peaked T, PR, flat P;" in out["summary"].iloc[0]


def test_site_override_of_the_severe_band_changes_the_haemolysis_texts():
    # A site's severe band at 7.0 (invented): 6.8 haemolysed without signs is now moderate, so it
    # drops one tier (3 -> 4), and the text gives the site's 7 mmol/L, never the shipped 6.5.
    rules = load_rules({"hyperkalemia": {"k_severe": 7.0}})
    out = screen_hyperkalemia(ecg_rows(k_mmol_l=6.8, k_hemolyzed=True), lead_rows(), rules)
    assert int(out["tier"].iloc[0]) == 4
    assert "Ranked one tier lower for haemolysis (no ECG sign, potassium below 7 mmol/L)." in caveats(out)
    assert not any("6.5" in c for c in caveats(out))
    kept = screen_hyperkalemia(ecg_rows(k_mmol_l=7.1, k_hemolyzed=True), lead_rows(), rules)
    assert int(kept["tier"].iloc[0]) == 2
    assert any("a potassium of 7 mmol/L or more is never ranked below tier 2" in c for c in caveats(kept))


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
    assert ev["rules"][0]["source"] == "site: site" and ev["rule_version"].startswith("hyperkalemia/1.1.0+site.")


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    cases=st.lists(
        st.tuples(st.floats(3.0, 9.0), st.floats(0.0, 3.0), st.booleans(), st.sampled_from([90.0, 125.0]),
                  st.sampled_from([70.0, 45.0])),
        min_size=10, max_size=10,
    )
)
def test_a_higher_potassium_never_lowers_the_tier(cases):
    # Monotone in K (the UKKA-2020 bands rise with K): raising K, all else equal, never gives a
    # less urgent tier.
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
    # H2: a haemolysed severe potassium (UKKA-2020 >= 6.5) is never ranked below tier 2.
    for i, (k, hemo, _, _) in enumerate(rows):
        if hemo and k >= 6.5:
            assert tiers[f"ecg-{i + 1}"] <= 2


@settings(max_examples=30, deadline=None)
@given(k=st.floats(5.5, 9.0), qrs=st.sampled_from([90.0, 125.0]), hr=st.sampled_from([70.0, 45.0]))
def test_haemolysis_never_makes_a_result_more_urgent(k, qrs, hr):
    # The same value and ECG, haemolysed or not: haemolysed ranks no higher (tier, then severity).
    aligned = ecg_rows(2, k_mmol_l=k, k_hemolyzed=[False, True], qrs_ms=qrs, heart_rate_bpm=hr)
    out = screen_hyperkalemia(aligned, leads_of(lead_rows("ecg-1"), lead_rows("ecg-2")), RULES).set_index("ecg_id")
    plain = (out.loc["ecg-1", "tier"], -json.loads(out.loc["ecg-1", "score_parts"])["severity"])
    hemo = (out.loc["ecg-2", "tier"], -json.loads(out.loc["ecg-2", "score_parts"])["severity"])
    assert hemo >= plain


def test_potassium_lowering_treatment_and_trend_are_reported():
    out = run(k_mmol_l=6.1, k_prev_mmol_l=5.2, k_change_mmol_l=0.9, k_lowering_24h=True)
    assert "previous 5.2" in out["summary"].iloc[0]
    assert json.loads(out["score_parts"].iloc[0])["trend"] == pytest.approx(0.9)
    assert any("Potassium-lowering" in c for c in json.loads(out["caveats"].iloc[0]))
