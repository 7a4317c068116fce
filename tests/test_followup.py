"""Follow-up rules of the missed-findings audit (pipeline/followup.py, `cardiosieve audit --lake`):
an invented night run through `cardiosieve run`, with the follow-ups (or their absence) planted in
the lake, and each finding's outcome worked out by hand from the planted times."""
from __future__ import annotations

import json
import re

import pandas as pd
import pytest

from cardiosieve.pipeline import followup
from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK, main
from cardiosieve.pipeline.codes import LOINC_TROPONIN_I_HS
from cardiosieve.pipeline.config import DEFAULT_AUDIT, settings_from_dict
from cardiosieve.pipeline.store import open_store, read_items, sqlite_url
from tests.lake_builders import ecg_row, lab_row, lead_rows, patient_row, write_lake

DAY, DAY2 = "2026-11-10", "2026-11-11"
STE = {lead: {"st_j_uv": 250.0} for lead in ("II", "III", "aVF")}   # inferior, 2.5x the 100 uV cut point
SITE = f"""[[troponin]]
code = "{LOINC_TROPONIN_I_HS}"
url_ng_l = 26
[drugs]
qt_prolonging = ["haloperidol"]
[audit]
follow_up_qt_drug_h = 12
"""


def _at(hhmm: str) -> str:
    return f"{DAY}T{hhmm}:00Z"


def _at2(hhmm: str) -> str:
    return f"{DAY2}T{hhmm}:00Z"


@pytest.fixture(scope="module")
def audited(tmp_path_factory):
    """One night with a finding per case; returns (out, lake, config)."""
    root = tmp_path_factory.mktemp("followup")
    wide = {"qrs_ms": 150.0}
    ecg = [ecg_row("E-K1", "P-K1", _at("09:00"), **wide),     # K 7.0 at 08:00, repeat at 12:00 (4 h)
           ecg_row("E-K2", "P-K2", _at("09:00"), **wide),     # K 6.8 at 08:00, repeat only at 16:00 (8 h)
           ecg_row("E-K3", "P-K3", _at("09:00"), **wide),     # K 6.0: below the severe band, not followed
           ecg_row("E-K4", "P-K4", _at("22:00"), **wide),     # K 6.9 at 21:30: window ends past the lake
           ecg_row("E-S1", "P-S1", _at("10:00")), ecg_row("E-S1b", "P-S1", _at("12:00")),   # repeat ECG 2 h
           ecg_row("E-S2", "P-S2", _at("10:00")),             # nothing after
           ecg_row("E-S3", "P-S3", _at("10:00")),             # troponin at 13:00 (3 h)
           ecg_row("E-Q1", "P-Q1", _at("10:00"), qt_ms=560.0),   # haloperidol at 14:00 (4 h after)
           ecg_row("E-Q2", "P-Q2", _at("10:00"), qt_ms=560.0),   # haloperidol only before the ECG
           # The second night: an elevation whose repeat ECG came after 8 h, and a severe
           # potassium late in the evening whose window runs past the lake's last day.
           ecg_row("E-S4", "P-S4", _at2("10:00")), ecg_row("E-S4b", "P-S4", _at2("18:00")),
           ecg_row("E-K5", "P-K5", _at2("22:00"), **wide)]
    leads = [r for e in ecg for r in lead_rows(e["ecg_id"], **(STE if e["ecg_id"] in ("E-S1", "E-S2", "E-S3", "E-S4") else {}))]
    labs = [lab_row("L1", "P-K1", _at("08:00"), value=7.0), lab_row("L1b", "P-K1", _at("12:00"), value=6.1),
            lab_row("L2", "P-K2", _at("08:00"), value=6.8), lab_row("L2b", "P-K2", _at("16:00"), value=6.0),
            lab_row("L3", "P-K3", _at("08:00"), value=6.0), lab_row("L4", "P-K4", _at("21:30"), value=6.9),
            lab_row("T3", "P-S3", _at("13:00"), analyte=LOINC_TROPONIN_I_HS, value=40.0, unit="ng/L")]
    labs += [lab_row(f"N-{p}", p, _at("07:00"), value=4.0) for p in ("P-S1", "P-S2", "P-S3", "P-Q1", "P-Q2")]
    labs += [lab_row("N-P-S4", "P-S4", _at2("07:00"), value=4.0), lab_row("L5", "P-K5", _at2("21:30"), value=6.6)]
    meds = [{"patient_id": "P-Q1", "administered_at": pd.Timestamp(_at("14:00")), "drug": "Haloperidol"},
            {"patient_id": "P-Q2", "administered_at": pd.Timestamp(_at("06:00")), "drug": "haloperidol"}]
    patients = [patient_row(p, sex="M", birth_date="1950-01-01") for p in sorted({e["patient_id"] for e in ecg})]
    lake = write_lake(root / "lake", ecg=ecg, leads=leads, labs=labs, patients=patients, medication=meds)
    config = root / "site.toml"
    config.write_text(SITE)
    out = root / "out"
    for start, end in ((DAY, DAY2), (DAY2, "2026-11-12")):        # two nights, as the scheduler runs them
        assert main(["run", "--lake", str(lake), "--config", str(config), "--out", str(out),
                     "--start", start, "--end", end, "-q"]) == EXIT_OK
    # Reviews as staff record them: E-K1's item after 30 min, E-S2's after 3 h (the night's run
    # ended, and first flagged its items, at 2026-11-11 00:00).
    engine = open_store(sqlite_url(out))
    ids = read_items(engine).set_index("ecg_id")["item_id"]
    engine.dispose()
    for ecg_id, at in (("E-K1", "2026-11-11T00:30:00Z"), ("E-S2", "2026-11-11T03:00:00Z")):
        assert main(["review", ids[ecg_id], "--outcome", "finding_real", "--role", "registrar", "--at", at,
                     "--out", str(out)]) == EXIT_OK
    return out, lake, config


def _audit(capsys, audited, *extra):
    out, lake, config = audited
    code = main(["audit", "--out", str(out), "--since", "2026-11-01", "--until", "2026-12-01", "--config",
                 str(config), "--lake", str(lake), *extra])
    return code, capsys.readouterr().out


def test_each_rule_outcome_worked_by_hand(audited, capsys):
    code, text = _audit(capsys, audited, "--format", "json", "--items")
    assert code == EXIT_OK
    rows = {r["ecg_id"]: r for r in json.loads(text)["follow_up_items"]}
    got = {e: (r["rule"], r["outcome"], r["hours_to_next"], r["next_kind"]) for e, r in rows.items()}
    assert got == {
        # Severe potassium: the repeat 4 h after the 08:00 result; P-K2's repeat came after 8 h,
        # past the 6 h window; P-K4's window (21:30 + 6 h) closed inside the second night, which
        # the lake holds, with no repeat; P-K5's (the second night, 21:30 + 6 h) runs past the
        # lake's last day: not yet known.
        "E-K1": ("k_no_repeat", "as_expected", 4.0, "potassium"),
        "E-K2": ("k_no_repeat", "to_review", None, ""),
        "E-K4": ("k_no_repeat", "to_review", None, ""),
        "E-K5": ("k_no_repeat", "window_open", None, ""),
        # ST elevation: a repeat ECG after 2 h; nothing; a troponin after 3 h; a repeat after 8 h.
        "E-S1": ("st_elevation_no_repeat", "as_expected", 2.0, "ecg"),
        "E-S2": ("st_elevation_no_repeat", "to_review", None, ""),
        "E-S3": ("st_elevation_no_repeat", "as_expected", 3.0, "troponin"),
        "E-S4": ("st_elevation_no_repeat", "to_review", None, ""),
        # QTc 560 ms: haloperidol 4 h after the ECG (within the site's 12 h) is the concern; a
        # dose before the ECG only is not.
        "E-Q1": ("qt_drug_after", "to_review", 4.0, "qt_drug"),
        "E-Q2": ("qt_drug_after", "as_expected", None, ""),
    }
    # K 6.0 is below the severe band's 6.5: a finding, but not one this rule follows.
    assert "E-K3" not in rows
    # The potassium rule's window opens when the potassium was collected, not at the ECG.
    assert rows["E-K1"]["anchor_at"].startswith(f"{DAY}T08:00")


def test_time_to_review_of_the_reviewed_items_by_hand(audited, capsys):
    code, text = _audit(capsys, audited, "--format", "json", "--items")
    doc = json.loads(text)
    per = {r["patient_id"]: r for r in doc["timeliness_items"]}
    # Tier 1, target 1 h: 0.5 h is in time, 3 h is late; the other tier-1 items, never reviewed
    # and weeks past their hour when the audit runs, are overdue.
    assert (per["P-K1"]["hours_to_review"], per["P-K1"]["timeliness"]) == (0.5, "in_time")
    assert (per["P-S2"]["hours_to_review"], per["P-S2"]["timeliness"]) == (3.0, "late")
    assert per["P-Q1"]["timeliness"] == "overdue"
    row = next(r for r in doc["timeliness"] if r["screen"] == "st_deviation")
    assert (row["items"], row["reviewed"], row["reviewed_late"], row["overdue"]) == (4, 1, 1, 3)
    ppv = {r["screen"]: r for r in doc["yield_by_rule_version"]}
    assert (ppv["hyperkalemia"]["reviewed"], ppv["hyperkalemia"]["ppv"]) == (1, 1.0)


def test_the_counts_per_rule_and_rule_version_and_no_identifier_without_items(audited, capsys):
    code, text = _audit(capsys, audited, "--format", "json")
    assert code == EXIT_OK
    doc = json.loads(text)
    by_rule = {r["rule"]: r for r in doc["follow_up"]}
    assert {k: (r["findings"], r["as_expected"], r["to_review"], r["window_open"], r["not_assessed"])
            for k, r in by_rule.items()} == {"k_no_repeat": (4, 1, 2, 1, 0),
                                             "st_elevation_no_repeat": (4, 2, 2, 0, 0),
                                             "qt_drug_after": (2, 1, 1, 0, 0)}
    assert by_rule["k_no_repeat"]["rule_version"] == "hyperkalemia/1.1.0"
    assert by_rule["qt_drug_after"]["window_h"] == 12.0            # the site's [audit] value
    assert "follow_up_items" not in doc and "timeliness_items" not in doc
    assert not re.search(r"\b(P|E)-[A-Z]\d|wl-", text)


def test_the_table_and_the_offline_html(audited, capsys, tmp_path):
    code, text = _audit(capsys, audited)
    assert code == EXIT_OK and text.startswith("Screening aid") and "to_review" in text
    assert not re.search(r"\b(P|E)-[A-Z]\d|wl-", text)
    page = tmp_path / "audit.html"
    code, _ = _audit(capsys, audited, "--format", "html", "--output", str(page))
    html = page.read_text()
    assert code == EXIT_OK and "Screening aid" in html and html.count("<img") == 3
    assert not re.search(r"""(src|href)=["']?(https?:)?//""", html)       # nothing fetched
    assert not re.search(r"\b(P|E)-[A-Z]\d|wl-", html)


def test_csv_and_parquet_files_one_per_part(audited, capsys, tmp_path):
    code, _ = _audit(capsys, audited, "--format", "parquet", "--output", str(tmp_path / "p"), "--items")
    assert code == EXIT_OK
    names = sorted(p.name for p in (tmp_path / "p").iterdir())
    assert names == ["audit_follow_up.parquet", "audit_follow_up_items.parquet", "audit_timeliness.parquet",
                     "audit_timeliness_items.parquet", "audit_yield_by_rule_version.parquet"]
    f = pd.read_parquet(tmp_path / "p" / "audit_follow_up.parquet")
    assert int(f["to_review"].sum()) == 5


def test_without_the_lake_the_follow_ups_are_not_assessed_never_absent(audited, capsys):
    out, _, config = audited
    assert main(["audit", "--out", str(out), "--since", "2026-11-01", "--until", "2026-12-01"]) == EXIT_OK
    assert "not assessed: no --lake given" in capsys.readouterr().out


@pytest.mark.parametrize("extra,why", [(["--format", "csv"], "--output"),
                                       (["--format", "html"], "--output"),
                                       (["--lake", "/nonexistent/lake"], "not a folder")])
def test_bad_arguments_are_exit_2_with_one_line(audited, capsys, extra, why):
    out = audited[0]
    assert main(["audit", "--out", str(out), "--since", "2026-11-01", *extra]) == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert why in err and len(err.strip().splitlines()) == 1


# --- the pure functions on hand-made frames --------------------------------------------------------
AS_OF = pd.Timestamp("2026-12-01", tz="UTC")
COVERED = {"lab": pd.Timestamp("2026-11-30", tz="UTC"), "ecg": pd.Timestamp("2026-11-30", tz="UTC"),
           "medication": pd.Timestamp("2026-11-30", tz="UTC")}


def _finding(ecg_id, screen, at, tier=1, **values):
    return {"item_id": f"i-{ecg_id}", "screen": screen, "ecg_id": ecg_id, "patient_id": "p1",
            "acquired_at": pd.Timestamp(at, tz="UTC"), "tier": tier, "rule_version": f"{screen}/1",
            "evidence": json.dumps({"values": values})}


def _events(*times):
    return pd.DataFrame({"patient_id": ["p1"] * len(times), "at": [pd.Timestamp(t, tz="UTC") for t in times]})


def _inputs(**over):
    none = _events()
    base = {"potassium": none, "troponin": none, "ecg": none, "qt_drug": none, "covered_until": dict(COVERED),
            "medication": True}
    base.update(over)
    return base


def _check(findings, **inputs):
    cands = followup.follow_up_candidates(pd.DataFrame(findings), dict(DEFAULT_AUDIT))
    return followup.check_follow_ups(cands, _inputs(**inputs), AS_OF).set_index("ecg_id")


def test_a_missing_input_is_not_assessed_never_reassurance():
    got = _check([_finding("k", "hyperkalemia", "2026-11-10 09:00", k_mmol_l=7.1, k_offset_min=None),
                  _finding("q", "long_qt", "2026-11-10 09:00", qtc_ms=None)])
    # No time for the potassium: its window cannot be placed. No QTc: the rule cannot tell.
    assert got["outcome"].to_dict() == {"k": "not_assessed", "q": "not_assessed"}
    # No medication feed in the lake: a QTc of 530 ms is not assessed, not "no dose given".
    covered = {**COVERED, "medication": pd.NaT}
    got = _check([_finding("q", "long_qt", "2026-11-10 09:00", qtc_ms=530.0)], covered_until=covered,
                 medication=False)
    assert got.loc["q", "outcome"] == "not_assessed"


def test_the_window_edge_the_earlier_of_ecg_and_troponin_and_the_same_instant():
    f = [_finding("s", "st_deviation", "2026-11-10 10:00", pattern="st_elevation"),
         _finding("k", "hyperkalemia", "2026-11-10 10:00", k_mmol_l=6.5, k_offset_min=-60.0)]
    got = _check(f, ecg=_events("2026-11-10 10:00", "2026-11-10 15:00"), troponin=_events("2026-11-10 14:00"),
                 potassium=_events("2026-11-10 09:00", "2026-11-10 15:00"))
    # ST: the ECG itself (same instant) is not a repeat; the troponin at 4 h comes before the ECG at 5 h.
    assert (got.loc["s", "outcome"], got.loc["s", "hours_to_next"], got.loc["s", "next_kind"]) == \
        ("as_expected", 4.0, "troponin")
    # K 6.5 is in the severe band (>= 6.5, UKKA-2020); collected 09:00, repeat at 15:00: exactly
    # 6 h, inside the window.
    assert (got.loc["k", "outcome"], got.loc["k", "hours_to_next"]) == ("as_expected", 6.0)
    got = _check(f, potassium=_events("2026-11-10 09:00", "2026-11-10 15:01"))
    assert got.loc["k", "outcome"] == "to_review"


def test_only_elevation_patterns_and_qtc_above_the_limit_are_followed():
    f = [_finding("d", "st_deviation", "2026-11-10 10:00", pattern="st_depression"),
         _finding("p", "st_deviation", "2026-11-10 10:00", pattern="posterior_depression"),
         _finding("q500", "long_qt", "2026-11-10 10:00", qtc_ms=500.0),
         _finding("q501", "long_qt", "2026-11-10 10:00", qtc_ms=501.0)]
    got = _check(f)
    # A depression alone is not followed; posterior (an equivalent, never below tier 2) is.
    # "Above 500 ms" [AHA-2010-TDP]: 500 is not above it.
    assert sorted(got.index) == ["p", "q501"]


def test_an_audit_before_the_window_closes_is_window_open():
    late = _finding("s", "st_deviation", "2026-11-30 20:00", pattern="st_elevation")
    cands = followup.follow_up_candidates(pd.DataFrame([late]), dict(DEFAULT_AUDIT))
    covered = {k: pd.Timestamp("2026-12-02", tz="UTC") for k in COVERED}
    got = followup.check_follow_ups(cands, _inputs(covered_until=covered), pd.Timestamp("2026-11-30 23:00", tz="UTC"))
    assert got["outcome"].tolist() == ["window_open"]


def test_latest_findings_prefer_the_latest_run_and_keep_items_before_the_history():
    h = pd.DataFrame([{**_finding("e1", "long_qt", "2026-11-10 10:00", tier=2), "run_end_at": pd.Timestamp("2026-11-11", tz="UTC")},
                      {**_finding("e1", "long_qt", "2026-11-10 10:00", tier=1), "run_end_at": pd.Timestamp("2026-11-20", tz="UTC"),
                       "rule_version": "long_qt/2"}])
    items = pd.DataFrame([{**_finding("e1", "long_qt", "2026-11-10 10:00"), "ecg_at": pd.Timestamp("2026-11-10 10:00", tz="UTC")},
                          {**_finding("e0", "long_qt", "2026-11-01 10:00", tier=3),
                           "ecg_at": pd.Timestamp("2026-11-01 10:00", tz="UTC")}]).drop(columns="acquired_at")
    got = followup.latest_findings(h, items).set_index("ecg_id")
    assert got.loc["e1", "rule_version"] == "long_qt/2" and got.loc["e1", "tier"] == 1
    assert got.loc["e0", "tier"] == 3 and len(got) == 2


def test_the_site_sets_follow_up_windows_and_a_bad_key_is_refused():
    s = settings_from_dict({"audit": {"follow_up_k_h": 4, "review_target_h_tier_1": 2}})
    assert s.audit["follow_up_k_h"] == 4.0 and s.review_target_h()[1] == 2.0 and len(s.review_target_h()) == 4
    for bad in ({"follow_up_k_hours": 4}, {"follow_up_st_h": 0}, {"follow_up_qtc_ms": "long"}):
        with pytest.raises(ValueError, match=r"\[audit\]"):
            settings_from_dict({"audit": bad})
