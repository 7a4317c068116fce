"""Worklist items: episode folding, stable item_id, score and rank, explained away, reopen rule.
Each test builds its own small findings frame (FINDING_COLUMNS)."""
import hashlib
import json

import numpy as np
import pandas as pd
import pytest

from cardiosieve.pipeline.worklist import (ITEM_COLUMNS, STATUS_CLOSED, STATUS_EXPLAINED, STATUS_OPEN, STATUS_REOPENED,
                               build_items, rank_items)
from cardiosieve.screens import FINDING_COLUMNS

NIGHT_END = pd.Timestamp("2026-03-02 02:00", tz="UTC")


def finding(ecg_id="ecg-1", patient_id="pat-1", at="2026-03-01 20:00", screen="hyperkalemia", tier=2,
            severity=0.5, lab_confirmed=1, lab_gap_min=60.0, trend=0.0, values=None, **parts):
    """One findings row with dull defaults (FINDING_COLUMNS, in order)."""
    return {
        "ecg_id": ecg_id, "patient_id": patient_id, "acquired_at": pd.Timestamp(at, tz="UTC"),
        "screen": screen, "tier": tier,
        "score_parts": json.dumps({"severity": severity, "lab_confirmed": lab_confirmed,
                                   "lab_gap_min": lab_gap_min, "trend": trend, **parts}),
        "summary": f"finding on {ecg_id}",
        "evidence": json.dumps({"rule_version": f"{screen}/1.0.0", "values": values or {}, "rules": []}),
        "caveats": "[]", "territories": "", "rule_version": f"{screen}/1.0.0",
    }


def findings(*rows):
    df = pd.DataFrame(list(rows), columns=FINDING_COLUMNS)
    df["acquired_at"] = df["acquired_at"].astype("datetime64[us, UTC]")
    df["tier"] = df["tier"].astype("int64")
    return df


def aligned(*rows):
    """Aligned rows: only the columns the worklist reads (location, potassium)."""
    base = {"ecg_id": "ecg-1", "patient_id": "pat-1", "acquired_at": "2026-03-01 20:00", "location": "ward",
            "k_mmol_l": np.nan, "k_offset_min": np.nan, "k_hemolyzed": pd.NA, "k_result_id": np.nan}
    df = pd.DataFrame([{**base, **r} for r in rows])
    df["acquired_at"] = pd.to_datetime(df["acquired_at"]).dt.tz_localize("UTC").dt.as_unit("us")
    df["k_hemolyzed"] = df["k_hemolyzed"].astype("boolean")
    df["k_result_id"] = df["k_result_id"].astype("str")
    return df


def build(f, al=None, existing=None, run_id="run-1", now=NIGHT_END, **kw):
    return build_items(f, al, existing, run_id, now, **kw)


# --- episodes and item_id ---------------------------------------------------------------------
def test_item_id_is_prefix_plus_sha1_of_patient_screen_episode_start():
    # The documented recipe (docs/prioritisation.md): wl- + sha1("patient|screen|start ISO")[:16].
    items = build(findings(finding(at="2026-03-01 20:00")))
    expected = "wl-" + hashlib.sha1(b"pat-1|hyperkalemia|2026-03-01T20:00:00.000000Z").hexdigest()[:16]
    assert items["item_id"].tolist() == [expected]


def test_rerun_with_other_run_id_and_row_order_gives_same_item_ids():
    f = findings(finding("e1", "p1", "2026-03-01 10:00"), finding("e2", "p2", "2026-03-01 11:00"),
                 finding("e3", "p1", "2026-03-01 12:00", screen="long_qt"))
    a = build(f, run_id="run-a")
    b = build(f.iloc[::-1].reset_index(drop=True), run_id="run-b")
    assert sorted(a["item_id"]) == sorted(b["item_id"])
    assert len(a) == 3


def test_rule_version_does_not_change_item_id():
    f1 = findings(finding(at="2026-03-01 10:00"))
    f2 = f1.assign(rule_version="hyperkalemia/2.0.0")
    assert build(f1)["item_id"].tolist() == build(f2)["item_id"].tolist()


def test_same_screen_same_patient_within_72_h_fold_into_one_item_keeping_most_severe_ecg():
    f = findings(finding("e1", at="2026-03-01 00:00", tier=2, severity=0.5),
                 finding("e2", at="2026-03-02 00:00", tier=1, severity=0.6),
                 finding("e3", at="2026-03-03 00:00", tier=1, severity=0.9))
    items = build(f, now=pd.Timestamp("2026-03-04", tz="UTC"))
    assert len(items) == 1
    row = items.iloc[0]
    assert row["ecg_id"] == "e3"                      # tier 1 beats tier 2; then higher severity
    assert json.loads(row["other_ecg_ids"]) == ["e1", "e2"]
    assert row["episode_start"] == pd.Timestamp("2026-03-01", tz="UTC")
    assert row["episode_end"] == pd.Timestamp("2026-03-03", tz="UTC")


def test_gap_of_exactly_72_h_stays_in_episode_and_a_longer_gap_starts_a_new_one():
    # Episode rule (docs/prioritisation.md): a new episode where the gap to the previous finding
    # exceeds episode_h, 72 h by default.
    at_72 = findings(finding("e1", at="2026-03-01 00:00"), finding("e2", at="2026-03-04 00:00"))
    over = findings(finding("e1", at="2026-03-01 00:00"), finding("e2", at="2026-03-04 00:00:01"))
    now = pd.Timestamp("2026-03-05", tz="UTC")
    assert len(build(at_72, now=now)) == 1
    assert len(build(over, now=now)) == 2


def test_chain_of_findings_each_within_72_h_is_one_episode():
    f = findings(*[finding(f"e{i}", at=pd.Timestamp("2026-03-01") + pd.Timedelta(hours=60 * i)) for i in range(4)])
    assert len(build(f, now=pd.Timestamp("2026-03-10", tz="UTC"))) == 1


def test_episode_window_is_configurable():
    f = findings(finding("e1", at="2026-03-01 00:00"), finding("e2", at="2026-03-01 13:00"))
    now = pd.Timestamp("2026-03-02", tz="UTC")
    assert len(build(f, now=now, episode_h=12)) == 2
    assert len(build(f, now=now, episode_h=72)) == 1


def test_other_patient_or_other_screen_never_folds():
    f = findings(finding("e1", "p1", "2026-03-01 00:00"), finding("e2", "p2", "2026-03-01 01:00"),
                 finding("e3", "p1", "2026-03-01 02:00", screen="long_qt"))
    assert len(build(f)) == 3


def test_next_night_within_episode_reuses_stored_item_id():
    night1 = build(findings(finding("e1", at="2026-03-01 20:00", severity=0.5)))
    night2 = build(findings(finding("e2", at="2026-03-02 21:00", severity=0.4)), existing=night1,
                   run_id="run-2", now=pd.Timestamp("2026-03-03 02:00", tz="UTC"))
    assert night2["item_id"].tolist() == night1["item_id"].tolist()
    row = night2.iloc[0]
    assert row["ecg_id"] == "e1"                       # the stored ECG is still the most severe
    assert json.loads(row["other_ecg_ids"]) == ["e2"]
    assert row["first_flagged_at"] == NIGHT_END        # kept from night 1


def test_overlapping_window_finding_an_earlier_ecg_reuses_stored_item_id():
    night1 = build(findings(finding("e2", at="2026-03-01 20:00")))
    # A wider rerun sees an earlier ECG of the same episode and e2 again.
    rerun = build(findings(finding("e1", at="2026-02-28 20:00"), finding("e2", at="2026-03-01 20:00")),
                  existing=night1, run_id="run-2")
    assert rerun["item_id"].tolist() == night1["item_id"].tolist()
    assert rerun.iloc[0]["episode_start"] == pd.Timestamp("2026-02-28 20:00", tz="UTC")


def test_next_night_after_the_episode_gets_a_new_item():
    night1 = build(findings(finding("e1", at="2026-03-01 00:00")))
    later = build(findings(finding("e2", at="2026-03-05 00:00")), existing=night1,
                  now=pd.Timestamp("2026-03-05 02:00", tz="UTC"))
    assert later["item_id"].tolist() != night1["item_id"].tolist()
    assert len(later) == 1                                # the stored item is not returned unchanged


def test_rerun_with_stored_items_returns_identical_items():
    f = findings(finding("e1", at="2026-03-01 10:00"), finding("e2", "p2", at="2026-03-01 11:00"))
    first = build(f)
    again = build(f, existing=first)
    pd.testing.assert_frame_equal(first, again)


def test_build_items_leaves_inputs_unchanged_and_empty_in_gives_empty_out():
    f = findings(finding())
    before = f.copy()
    build(f, aligned(dict()))
    pd.testing.assert_frame_equal(f, before)
    empty = build(findings())
    assert empty.empty and list(empty.columns) == ITEM_COLUMNS


def test_items_have_contract_columns_first_and_utc_timestamps():
    items = build(findings(finding()))
    assert list(items.columns[:15]) == ["item_id", "rank", "tier", "screen", "patient_id", "ecg_id", "ecg_at",
                                        "score", "summary", "evidence", "caveats", "territories",
                                        "rule_version", "run_id", "first_flagged_at"]
    assert {"status", "last_updated_at"} <= set(items.columns)
    assert str(items["ecg_at"].dtype) == "datetime64[us, UTC]"
    assert items.iloc[0]["status"] == STATUS_OPEN


def test_now_must_be_tz_aware():
    with pytest.raises(ValueError):
        build(findings(finding()), now=pd.Timestamp("2026-03-02"))


# --- score and rank ---------------------------------------------------------------------------
def test_worked_example_of_docs_prioritisation_scores_0_774028():
    # docs/prioritisation.md worked example, computed by hand there:
    # 0.45*0.8 + 0.20*(1 - 55/1440) + 0.10*0.3 + 0.10*1.0 (ED) + 0.10*(1 - 6/72) = 0.774028
    f = findings(finding("e1", at="2026-03-01 20:00", tier=1, severity=0.8, lab_confirmed=1, lab_gap_min=55,
                         trend=0.3))
    items = build(f, aligned({"ecg_id": "e1", "location": "ED"}), now=pd.Timestamp("2026-03-02 02:00", tz="UTC"))
    assert items.iloc[0]["score"] == pytest.approx(0.774028, abs=1e-6)


def test_tier_comes_before_score():
    # A tier-2 item with every part at its maximum (0.95, docs) still ranks below a weak tier-1 item.
    f = findings(finding("e1", "p1", at="2026-03-02 02:00", tier=2, severity=1, lab_confirmed=1, lab_gap_min=0,
                         trend=1),
                 finding("e2", "p2", at="2026-03-01 00:00", tier=1, severity=0, lab_confirmed=0))
    items = rank_items(build(f, aligned({"ecg_id": "e1", "location": "ICU"}, {"ecg_id": "e2", "location": "clinic"})))
    assert items["ecg_id"].tolist() == ["e2", "e1"]
    assert items["rank"].tolist() == [1, 2]
    assert items.set_index("ecg_id").loc["e1", "score"] == pytest.approx(0.95)


def test_location_weight_acute_above_ward_above_outpatient():
    # Local choice (docs): acute 1.0, ward 0.5, outpatient 0.0, unknown 0.5.
    f = findings(*[finding(f"e{i}", f"p{i}") for i in range(4)])
    al = aligned({"ecg_id": "e0", "location": "CCU"}, {"ecg_id": "e1", "location": "Ward 7"},
                 {"ecg_id": "e2", "location": "Cardiology outpatients"}, {"ecg_id": "e3", "location": None})
    score = build(f, al).set_index("ecg_id")["score"]
    assert score["e0"] - score["e1"] == pytest.approx(0.05)
    assert score["e1"] - score["e2"] == pytest.approx(0.05)
    assert score["e3"] == pytest.approx(score["e1"])


def test_lab_closeness_and_recency_lower_the_score():
    close = findings(finding("e1", "p1", lab_gap_min=0))
    far = findings(finding("e1", "p1", lab_gap_min=-720))   # 12 h before: half the closeness
    assert build(close).iloc[0]["score"] - build(far).iloc[0]["score"] == pytest.approx(0.20 * 0.5)
    old = build(findings(finding(at="2026-02-27 02:00"))).iloc[0]["score"]   # 72 h before the run: recency 0
    new = build(findings(finding(at="2026-03-02 02:00"))).iloc[0]["score"]   # at the run: recency 1
    assert new - old == pytest.approx(0.10)


def test_build_items_scores_but_leaves_the_rank_to_the_store():
    # The rank is computed once, in the store (store._rerank on upsert and review, global); a
    # rank among one night's items would be overwritten there.
    items = build(findings(finding("e1", "p1", tier=1), finding("e2", "p2", tier=2)))
    assert items["rank"].isna().all()
    assert items["score"].notna().all()


def test_rank_items_is_deterministic_for_ties():
    items = rank_items(build(findings(finding("e1", "p1"), finding("e2", "p2"))))
    shuffled = items.iloc[::-1].reset_index(drop=True)
    assert rank_items(shuffled)["item_id"].tolist() == items["item_id"].tolist()


# --- explained away ---------------------------------------------------------------------------
HAEMOLYSED = {"k_mmol_l": 6.4, "k_hemolyzed": True, "k_offset_min": -30.0, "k_result_id": "k-1"}


def test_haemolysed_potassium_followed_by_normal_repeat_is_explained_and_drops_in_rank():
    f = findings(finding("e1", "p1", at="2026-03-01 10:00", tier=1, severity=0.7, values=HAEMOLYSED),
                 finding("e9", "p9", at="2026-03-01 11:00", tier=2, severity=0.2))
    al = aligned({"ecg_id": "e1", "patient_id": "p1", "acquired_at": "2026-03-01 10:00", **HAEMOLYSED},
                 {"ecg_id": "e2", "patient_id": "p1", "acquired_at": "2026-03-01 14:00",
                  "k_mmol_l": 4.8, "k_hemolyzed": False, "k_offset_min": -10.0, "k_result_id": "k-2"})
    ranked = rank_items(build(f, al))
    items = ranked.set_index("ecg_id")
    assert items.loc["e1", "status"] == STATUS_EXPLAINED
    assert "4.8 mmol/L" in items.loc["e1", "status_reason"] and "haemolysed" in items.loc["e1", "status_reason"]
    # Haemolysed K at 09:30, repeat at 13:50: 4.3 h later.
    assert "4.3 h" in items.loc["e1", "status_reason"]
    # Tier 1 but explained: out of the review queue (no rank), listed below the tier-2 item.
    assert ranked["ecg_id"].tolist() == ["e9", "e1"]
    assert items.loc["e9", "rank"] == 1 and pd.isna(items.loc["e1", "rank"])


@pytest.mark.parametrize("later", [
    {"k_mmol_l": 4.8, "k_hemolyzed": pd.NA},     # haemolysis not reported: not known to be clean
    {"k_mmol_l": 4.8, "k_hemolyzed": True},      # repeat haemolysed too
    {"k_mmol_l": 5.5, "k_hemolyzed": False},     # 5.5 is already mild hyperkalaemia [UKKA-2020, memory]
])
def test_repeat_that_is_not_clean_and_normal_does_not_explain(later):
    f = findings(finding("e1", "p1", at="2026-03-01 10:00", values=HAEMOLYSED))
    al = aligned({"ecg_id": "e1", "patient_id": "p1", "acquired_at": "2026-03-01 10:00", **HAEMOLYSED},
                 {"ecg_id": "e2", "patient_id": "p1", "acquired_at": "2026-03-01 14:00", "k_offset_min": 0.0,
                  "k_result_id": "k-2", **later})
    assert build(f, al).iloc[0]["status"] == STATUS_OPEN


def test_back_to_normal_follows_the_sites_mild_band():
    from cardiosieve.pipeline.worklist import explainers_for
    from cardiosieve.screens.criteria import load_rules

    f = findings(finding("e1", "p1", at="2026-03-01 10:00", values=HAEMOLYSED))
    al = aligned({"ecg_id": "e1", "patient_id": "p1", "acquired_at": "2026-03-01 10:00", **HAEMOLYSED},
                 {"ecg_id": "e2", "patient_id": "p1", "acquired_at": "2026-03-01 14:00", "k_offset_min": 0.0,
                  "k_result_id": "k-2", "k_mmol_l": 5.6, "k_hemolyzed": False})
    shipped = explainers_for(load_rules())                                   # 5.6 is mild hyperkalaemia
    assert build(f, al, explainers=shipped).iloc[0]["status"] == STATUS_OPEN
    site = explainers_for(load_rules({"hyperkalemia": {"k_mild": 5.8}}))     # a site flags from 5.8
    assert build(f, al, explainers=site).iloc[0]["status"] == STATUS_EXPLAINED


def test_normal_repeat_does_not_explain_a_potassium_that_was_not_haemolysed():
    clean = {**HAEMOLYSED, "k_hemolyzed": False}
    f = findings(finding("e1", "p1", at="2026-03-01 10:00", values=clean))
    al = aligned({"ecg_id": "e1", "patient_id": "p1", "acquired_at": "2026-03-01 10:00", **clean},
                 {"ecg_id": "e2", "patient_id": "p1", "acquired_at": "2026-03-01 14:00",
                  "k_mmol_l": 4.8, "k_hemolyzed": False, "k_offset_min": 0.0, "k_result_id": "k-2"})
    assert build(f, al).iloc[0]["status"] == STATUS_OPEN


def test_normal_potassium_before_the_haemolysed_one_does_not_explain():
    f = findings(finding("e1", "p1", at="2026-03-01 10:00", values=HAEMOLYSED))
    al = aligned({"ecg_id": "e1", "patient_id": "p1", "acquired_at": "2026-03-01 10:00", **HAEMOLYSED},
                 {"ecg_id": "e0", "patient_id": "p1", "acquired_at": "2026-03-01 06:00",
                  "k_mmol_l": 4.8, "k_hemolyzed": False, "k_offset_min": 0.0, "k_result_id": "k-0"})
    assert build(f, al).iloc[0]["status"] == STATUS_OPEN


def test_stored_item_is_explained_by_the_next_nights_results_and_kept():
    night1 = build(findings(finding("e1", "p1", at="2026-03-01 10:00", values=HAEMOLYSED)))
    # Next night: no finding for p1, but a normal clean potassium with an unflagged ECG.
    al = aligned({"ecg_id": "e2", "patient_id": "p1", "acquired_at": "2026-03-02 09:00",
                  "k_mmol_l": 4.6, "k_hemolyzed": False, "k_offset_min": -20.0, "k_result_id": "k-2"})
    night2 = build(findings(), al, existing=night1, run_id="run-2", now=pd.Timestamp("2026-03-03 02:00", tz="UTC"))
    assert night2["item_id"].tolist() == night1["item_id"].tolist()
    assert night2.iloc[0]["status"] == STATUS_EXPLAINED
    assert night2.iloc[0]["run_id"] == "run-2"


# --- reopen rule ------------------------------------------------------------------------------
def closed(items):
    return items.assign(status=STATUS_CLOSED, status_reason="reviewed: finding_not_real")


def test_closed_item_stays_closed_for_an_equal_or_milder_finding_in_its_episode():
    night1 = closed(build(findings(finding("e1", at="2026-03-01 20:00", tier=2, severity=0.6))))
    night2 = build(findings(finding("e2", at="2026-03-02 20:00", tier=2, severity=0.6)), existing=night1,
                   now=pd.Timestamp("2026-03-03 02:00", tz="UTC"))
    assert night2.iloc[0]["status"] == STATUS_CLOSED
    assert night2.iloc[0]["status_reason"] == "reviewed: finding_not_real"


@pytest.mark.parametrize("tier,severity", [(1, 0.1), (2, 0.61)])
def test_closed_item_reopens_for_a_more_severe_finding_with_the_reason(tier, severity):
    night1 = closed(build(findings(finding("e1", at="2026-03-01 20:00", tier=2, severity=0.6))))
    night2 = build(findings(finding("e2", at="2026-03-02 20:00", tier=tier, severity=severity)), existing=night1,
                   now=pd.Timestamp("2026-03-03 02:00", tz="UTC"))
    row = night2.iloc[0]
    assert row["item_id"] == night1.iloc[0]["item_id"]
    assert row["status"] == STATUS_REOPENED and row["ecg_id"] == "e2"
    assert row["status_reason"].startswith("reopened: a more severe finding")
    assert "closed item (tier 2, severity 0.60)" in row["status_reason"]
