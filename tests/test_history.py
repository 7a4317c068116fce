"""The history the quality audit will stand on: every run's findings kept in finding_history
(append-only, in the upsert's transaction, idempotent per run, screen, ECG and rule version),
reviews that record the item's rule version and tier when they were made, closed items that
keep the finding that was reviewed, and first_flagged_at in a backfill (the ECG's time).

SQLite always; PostgreSQL when CARDIOSIEVE_TEST_PG_URL is set (see tests/test_store.py)."""
import json

import pandas as pd
import pytest
from sqlalchemy import func, select

from cardiosieve.pipeline import store
from cardiosieve.pipeline.store import (finding_history, import_reviews_csv, open_store, read_items, record_review,
                                        review, upsert_items, worklist_item)
from cardiosieve.pipeline.worklist import STATUS_CLOSED, build_items, fold_findings, history_rows
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake
from tests.test_store import NIGHT1, NIGHT2, engine, finding, findings, sqlite_engine  # noqa: F401 (fixtures)


def night_with_history(engine, rows, now=NIGHT1, run_id="run-1", backfill=False):
    """What stage_worklist does: fold the findings, build the items, upsert both in one go."""
    f = findings(*rows)
    existing = read_items(engine, patient_ids=f["patient_id"].unique())
    folded = fold_findings(f, None, existing)
    items = build_items(f, None, existing, run_id, now, backfill=backfill, folded=folded)
    return items, upsert_items(engine, items, history=history_rows(folded, run_id, now))


def history(engine) -> pd.DataFrame:
    with engine.connect() as conn:
        rows = conn.execute(finding_history.select().order_by(finding_history.c.history_id)).mappings().all()
    return pd.DataFrame(rows, columns=[c.name for c in finding_history.columns])


def with_version(row: dict, version: str) -> dict:
    """A finding as a rerun under other rules makes it: same ECG, another rule version."""
    return {**row, "rule_version": version}


NIGHT = [finding("e1", "p1", "2026-03-01 10:00", tier=1, severity=0.7),
         finding("e2", "p1", "2026-03-01 12:00", tier=2, severity=0.4),   # same episode as e1
         finding("e3", "p2", "2026-03-01 11:00", screen="long_qt", tier=3, severity=0.2)]


# --- finding_history --------------------------------------------------------------------------
def test_every_finding_of_a_run_is_kept_with_the_item_it_folded_into(engine):
    items, counts = night_with_history(engine, NIGHT)
    assert counts["history"] == 3 and counts["inserted"] == 2   # e1 and e2 fold into one item
    h = history(engine).set_index("ecg_id")
    item_of = read_items(engine).set_index("ecg_id")["item_id"]
    assert h.loc["e1", "item_id"] == h.loc["e2", "item_id"] == item_of["e1"]
    assert h.loc["e3", "item_id"] == item_of["e3"]
    assert h["run_id"].eq("run-1").all() and h["run_end_at"].eq(NIGHT1).all()
    # The folded finding as it was, not the item: e2 keeps its own tier and severity.
    assert (h.loc["e2", "tier"], h.loc["e2", "screen"], h.loc["e2", "patient_id"]) == (2, "hyperkalemia", "p1")
    assert h.loc["e2", "acquired_at"] == pd.Timestamp("2026-03-01 12:00", tz="UTC")
    assert h.loc["e2", "rule_version"] == "hyperkalemia/1.0.0"
    assert json.loads(h.loc["e2", "score_parts"])["severity"] == 0.4


def test_the_history_rows_built_are_the_columns_of_the_table():
    from cardiosieve.pipeline import worklist
    assert worklist.HISTORY_COLUMNS == store.HISTORY_COLUMNS


def test_rerunning_the_same_window_under_the_same_rules_adds_no_history(engine):
    night_with_history(engine, NIGHT)
    _, counts = night_with_history(engine, NIGHT)
    assert counts["history"] == 0 and len(history(engine)) == 3


def test_rerunning_the_same_window_under_changed_rules_adds_its_findings(engine):
    night_with_history(engine, NIGHT)
    _, counts = night_with_history(engine, [with_version(r, r["rule_version"] + "+site.0a1b2c3d") for r in NIGHT])
    h = history(engine)
    assert counts["history"] == 3 and len(h) == 6
    assert h.groupby("ecg_id")["rule_version"].nunique().eq(2).all()


def test_the_history_rolls_back_with_the_items(engine):
    night_with_history(engine, NIGHT)
    before_items, before_history = read_items(engine), history(engine)
    f = findings(finding("e7", "p7"), finding("e8", "p8"))
    folded = fold_findings(f, None, None)
    items = build_items(f, None, None, "run-2", NIGHT2, folded=folded)
    rows = history_rows(folded, "run-2", NIGHT2)
    rows.loc[1, "tier"] = 9   # violates finding_history's tier check, after the items are written
    with pytest.raises(Exception):
        upsert_items(engine, items, history=rows)
    pd.testing.assert_frame_equal(read_items(engine), before_items)
    pd.testing.assert_frame_equal(history(engine), before_history)


def test_history_rows_without_a_rule_version_are_refused_naming_the_column_not_the_row(sqlite_engine):
    f = findings(finding("e1", "secret-patient"))
    folded = fold_findings(f, None, None)
    items = build_items(f, None, None, "run-1", NIGHT1, folded=folded)
    rows = history_rows(folded, "run-1", NIGHT1).assign(rule_version=None)
    with pytest.raises(ValueError, match=r"^finding_history: 1 row\(s\) without rule_version$"):
        upsert_items(sqlite_engine, items, history=rows)
    assert read_items(sqlite_engine).empty


# --- reviews and closed items -------------------------------------------------------------------
def test_a_review_records_the_items_rule_version_and_tier_then(engine, tmp_path):
    items, _ = night_with_history(engine, NIGHT)
    iid = items.set_index("ecg_id")["item_id"]
    record_review(engine, iid["e1"], "finding_real", "registrar", None, NIGHT1 + pd.Timedelta(hours=3))
    csv = tmp_path / "reviews.csv"
    csv.write_text("item_id,reviewed_at,reviewer_role,outcome\n"
                   f"{iid['e3']},2026-03-02T09:00:00Z,consultant,finding_not_real\n")
    assert import_reviews_csv(engine, csv)["imported"] == 1
    with engine.connect() as conn:
        got = conn.execute(select(review.c.item_id, review.c.rule_version_at_review, review.c.tier_at_review,
                                  review.c.recorded_via).order_by(review.c.review_id)).all()
    assert [tuple(r) for r in got] == [(iid["e1"], "hyperkalemia/1.0.0", 1, "cli"),
                                       (iid["e3"], "long_qt/1.0.0", 3, "csv")]


def test_a_rerun_under_an_override_never_rewrites_a_closed_items_finding(engine):
    items, _ = night_with_history(engine, NIGHT)
    iid = items.set_index("ecg_id").loc["e1", "item_id"]
    record_review(engine, iid, "finding_real", "registrar", None, NIGHT1 + pd.Timedelta(hours=3))
    reviewed = read_items(engine).set_index("item_id").loc[iid]
    # The same night again under a site override: e1 now comes out milder (tier 2, severity
    # 0.3): not more severe, so the item stays closed, and keeps what the reviewer saw.
    override = [with_version(finding("e1", "p1", "2026-03-01 10:00", tier=2, severity=0.3, summary="milder"),
                             "hyperkalemia/1.0.0+site.0a1b2c3d"),
                with_version(NIGHT[1], "hyperkalemia/1.0.0+site.0a1b2c3d")]
    _, counts = night_with_history(engine, override, now=NIGHT2, run_id="run-2")
    row = read_items(engine).set_index("item_id").loc[iid]
    assert counts["reopened"] == 0 and row["status"] == STATUS_CLOSED
    for c in ("rule_version", "tier", "ecg_id", "summary", "evidence", "score_parts"):
        assert row[c] == reviewed[c], c
    assert row["rule_version"] == "hyperkalemia/1.0.0" and row["tier"] == 1
    assert json.loads(row["other_ecg_ids"]) == ["e2"]
    # The override's findings are in the history, beside the first run's.
    h = history(engine)
    new = h[h["run_id"].eq("run-2")].set_index("ecg_id")
    assert sorted(new.index) == ["e1", "e2"] and new["item_id"].eq(iid).all()
    assert (new.loc["e1", "rule_version"], new.loc["e1", "tier"]) == ("hyperkalemia/1.0.0+site.0a1b2c3d", 2)
    with engine.connect() as conn:
        at_review = conn.execute(select(review.c.rule_version_at_review, review.c.tier_at_review)).one()
    assert tuple(at_review) == ("hyperkalemia/1.0.0", 1)


def test_a_more_severe_finding_under_an_override_still_reopens_with_its_own_rule_version(engine):
    items, _ = night_with_history(engine, NIGHT)
    iid = items.set_index("ecg_id").loc["e1", "item_id"]   # e1 and e2's item: tier 1, severity 0.7
    record_review(engine, iid, "finding_not_real", "registrar", None, NIGHT1 + pd.Timedelta(hours=3))
    worse = with_version(finding("e1", "p1", "2026-03-01 10:00", tier=1, severity=0.9), "hyperkalemia/2.0.0")
    _, counts = night_with_history(engine, [worse], now=NIGHT2, run_id="run-2")
    row = read_items(engine).set_index("item_id").loc[iid]
    assert counts["reopened"] == 1 and row["status"] == "reopened" and row["rule_version"] == "hyperkalemia/2.0.0"


# --- first_flagged_at: a night against a backfill -------------------------------------------------
def test_build_items_in_a_backfill_flags_new_items_at_their_first_ecgs_time():
    f = findings(*NIGHT)
    night_items = build_items(f, None, None, "run-1", NIGHT1).set_index("ecg_id")
    back = build_items(f, None, None, "run-1", NIGHT1, backfill=True).set_index("ecg_id")
    assert night_items["first_flagged_at"].eq(NIGHT1).all()
    # e1's item (e1 10:00 and e2 12:00) was first visible with e1; e3's with e3.
    assert back.loc["e1", "first_flagged_at"] == pd.Timestamp("2026-03-01 10:00", tz="UTC")
    assert back.loc["e3", "first_flagged_at"] == pd.Timestamp("2026-03-01 11:00", tz="UTC")


LONG_QT_AT = ["2026-11-02T09:30:00Z", "2026-11-05T14:15:00Z", "2026-11-09T22:45:00Z"]


def long_qt_lake(lake):
    """Three patients, each with one ECG of QT 520 ms at RR 1000 ms (QTc 520 ms: above the
    female limit of 460 ms), on three different days."""
    ecg = [ecg_row(f"E{i}", f"P{i}", at, qt_ms=520.0) for i, at in enumerate(LONG_QT_AT)]
    labs = [lab_row(f"R{i}", f"P{i}", at) for i, at in enumerate(LONG_QT_AT)]
    return write_lake(lake, ecg=ecg, labs=labs, patients=[patient_row(f"P{i}") for i in range(3)])


def stored_first_flagged(out) -> pd.Series:
    engine = open_store(store.sqlite_url(out), create=False)
    try:
        items = read_items(engine, screens=["long_qt"])
    finally:
        engine.dispose()
    return items.set_index("ecg_id")["first_flagged_at"].sort_index()


def test_a_multi_chunk_backfill_flags_items_at_their_ecgs_time_and_a_night_at_its_end(tmp_path):
    from cardiosieve.pipeline.run import run_interval

    lake = long_qt_lake(tmp_path / "lake")
    back = tmp_path / "backfill"
    summary = run_interval(str(lake), str(back), "2026-11-01T00:00:00Z", "2026-11-11T00:00:00Z",
                           quality=False, chunk_days=3)
    assert summary["chunks"] == 4          # [1, 4), [4, 7), [7, 10), [10, 11) November
    got = stored_first_flagged(back)
    assert got.to_dict() == {f"E{i}": pd.Timestamp(at) for i, at in enumerate(LONG_QT_AT)}

    nightly = tmp_path / "night"
    run_interval(str(lake), str(nightly), "2026-11-05T00:00:00Z", "2026-11-06T00:00:00Z", quality=False)
    assert stored_first_flagged(nightly).to_dict() == {"E1": pd.Timestamp("2026-11-06T00:00:00Z")}


# --- yield by the rule version reviewed under, and --until ----------------------------------------
V1, V2 = "hyperkalemia/1.0.0", "hyperkalemia/2.0.0"


def two_rule_versions(engine):
    """Night 1 under V1: items a, b, c, d (tier 2); a reviewed finding_real, b finding_not_real,
    c already_known. Night 2 under V2: d's patient has a more severe finding in d's episode (d is
    still open, so it takes the V2 finding) and d is then reviewed finding_not_real; new items e
    (reviewed finding_real) and f (not reviewed). Returns item_id by letter."""
    first = [finding(x, f"p{x}", "2026-03-01 20:00", tier=2) for x in "abcd"]
    items, _ = night_with_history(engine, first)
    ids = items.set_index("ecg_id")["item_id"].to_dict()
    at = lambda h: NIGHT1 + pd.Timedelta(hours=h)
    for x, outcome in (("a", "finding_real"), ("b", "finding_not_real"), ("c", "already_known")):
        record_review(engine, ids[x], outcome, "registrar", None, at(3))
    second = [with_version(finding("d2", "pd", "2026-03-02 20:00", tier=2, severity=0.6), V2),
              with_version(finding("e", "pe", "2026-03-02 20:00", tier=2), V2),
              with_version(finding("f", "pf", "2026-03-02 21:00", tier=2), V2)]
    items, _ = night_with_history(engine, second, now=NIGHT2, run_id="run-2")
    ids.update(items[items["ecg_id"].isin(["e", "f"])].set_index("ecg_id")["item_id"].to_dict())
    record_review(engine, ids["d"], "finding_not_real", "registrar", None, NIGHT2 + pd.Timedelta(hours=2))
    record_review(engine, ids["e"], "finding_real", "registrar", None, NIGHT2 + pd.Timedelta(hours=4))
    return ids


def test_yield_by_rule_version_counts_each_item_under_the_version_it_was_reviewed_under(engine):
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)   # statsmodels' own imports
        from statsmodels.stats.proportion import proportion_confint
    two_rule_versions(engine)
    y = store.yield_table(engine, by="rule_version").set_index(["screen", "rule_version"])
    assert list(y.reset_index().columns[:2]) == ["screen", "rule_version"]
    v1, v2 = y.loc[("hyperkalemia", V1)], y.loc[("hyperkalemia", V2)]
    # By hand: V1 holds a, b, c (3 reviewed, true positives a + c = 2); V2 holds d (reviewed
    # under V2, its item took the V2 finding before), e (real) and f (not reviewed).
    assert (v1["items"], v1["reviewed"], v1["finding_real"], v1["already_known"], v1["finding_not_real"]) == (3, 3, 1, 1, 1)
    assert (v2["items"], v2["reviewed"], v2["finding_real"], v2["finding_not_real"]) == (3, 2, 1, 1)
    assert v1["ppv"] == pytest.approx(2 / 3) and v2["ppv"] == pytest.approx(0.5)
    # Wilson 2/3, z = 1.959964: centre (2/3 + z^2/6) / (1 + z^2/3) = 0.573084, half-width
    # z/(1 + z^2/3) * sqrt(2/27 + z^2/36) = 0.365425 (by hand); 1/2: 0.5 -+ 0.405467.
    assert (v1["ppv_low"], v1["ppv_high"]) == (pytest.approx(0.207659, abs=1e-5), pytest.approx(0.938509, abs=1e-5))
    assert (v2["ppv_low"], v2["ppv_high"]) == (pytest.approx(0.094533, abs=1e-5), pytest.approx(0.905467, abs=1e-5))
    ref_lo, ref_hi = proportion_confint([2, 1], [3, 2], alpha=0.05, method="wilson")
    np_lo, np_hi = [v1["ppv_low"], v2["ppv_low"]], [v1["ppv_high"], v2["ppv_high"]]
    assert np_lo == pytest.approx(list(ref_lo), abs=1e-12) and np_hi == pytest.approx(list(ref_hi), abs=1e-12)
    # a, b, c reviewed 3 h after NIGHT1; d 2 h and e 4 h after NIGHT2, d flagged at NIGHT1 (24 h before).
    assert v1["median_hours_to_review"] == pytest.approx(3.0) and v2["median_hours_to_review"] == pytest.approx(15.0)


def test_yield_until_is_the_open_end_of_the_first_flagged_window(engine):
    two_rule_versions(engine)
    items = lambda **kw: int(store.yield_table(engine, **kw)["items"].sum())
    # a, b, c, d first flagged at NIGHT1 (2026-03-02 02:00); e, f at NIGHT2 (2026-03-03 02:00).
    assert items() == 6
    assert items(until="2026-03-03") == 4 and items(since="2026-03-03") == 2
    assert items(until=NIGHT2) == 4                     # NIGHT2 itself is outside [.., until)
    assert items(since=NIGHT1, until=NIGHT1) == 0
    assert items(since="2026-03-02", until="2026-03-04") == 6


def test_yield_refuses_an_unknown_grouping(sqlite_engine):
    with pytest.raises(ValueError, match="grouping"):
        store.yield_table(sqlite_engine, by="reviewer")


def test_the_yield_command_groups_by_rule_version_in_table_json_and_csv(tmp_path, capsys):
    from cardiosieve.pipeline import commands
    from tests.test_commands import run

    engine = open_store(store.sqlite_url(tmp_path))
    two_rule_versions(engine)
    engine.dispose()
    assert commands.YIELD_GROUPS == store.YIELD_GROUPS
    code, text, _ = run(capsys, "yield", "--out", tmp_path, "--by", "rule_version")
    rows = [line.split() for line in text.splitlines()]
    assert code == 0 and rows[0][:4] == ["screen", "rule_version", "items", "reviewed"]
    assert rows[1][:7] == ["hyperkalemia", V1, "3", "3", "1", "1", "0.67"]
    assert rows[2][:7] == ["hyperkalemia", V2, "3", "2", "1", "0", "0.50"]
    code, text, _ = run(capsys, "yield", "--out", tmp_path, "--by", "rule_version", "--format", "json",
                        "--until", "2026-03-03")
    doc = json.loads(text)
    assert code == 0 and [(r["rule_version"], r["items"]) for r in doc["rows"]] == [(V1, 3), (V2, 1)]
    assert "screening" in doc["caution"].lower()
    code, text, _ = run(capsys, "yield", "--out", tmp_path, "--format", "csv", "--since", "2026-03-03")
    lines = text.splitlines()
    assert code == 0 and lines[0].startswith("screen,tier,items,reviewed,") and len(lines) == 2
    assert lines[1].startswith("hyperkalemia,2,2,1,")
    code, same, _ = run(capsys, "yield", "--out", tmp_path, "--format", "table")
    assert same == run(capsys, "yield", "--out", tmp_path, "--format", "text")[1]
    code, _, err = run(capsys, "yield", "--out", tmp_path, "--until", "not a date")
    assert code == 2 and err == "cardiosieve: yield: --since/--until: not a date (ISO 8601, e.g. 2026-03-01)\n"


# --- missed cases ---------------------------------------------------------------------------------
def test_a_missed_case_is_recorded_once_per_ecg_and_screen_and_counted_in_yield_per_screen(engine):
    two_rule_versions(engine)
    at = pd.Timestamp("2026-03-03 09:00", tz="UTC")
    assert store.record_missed_case(engine, "px", "ex1", "hyperkalemia", "registrar", "K 6.8, not flagged", at)
    assert not store.record_missed_case(engine, "px", "ex1", "hyperkalemia", "consultant", None, at)   # same ECG
    assert store.record_missed_case(engine, "px", "ex2", "hyperkalemia", "registrar", None, at)
    assert store.record_missed_case(engine, "py", "ey1", "st_deviation", "registrar", None, at)
    with engine.connect() as conn:
        rows = conn.execute(select(store.missed_case.c.patient_id, store.missed_case.c.ecg_id,
                                   store.missed_case.c.screen, store.missed_case.c.recorded_at,
                                   store.missed_case.c.reviewer_role, store.missed_case.c.note)
                            .order_by(store.missed_case.c.missed_id)).all()
    assert [tuple(r) for r in rows] == [("px", "ex1", "hyperkalemia", at, "registrar", "K 6.8, not flagged"),
                                        ("px", "ex2", "hyperkalemia", at, "registrar", None),
                                        ("py", "ey1", "st_deviation", at, "registrar", None)]
    y = store.yield_table(engine)
    # hyperkalemia: 2 missed cases, on its one row (tier 2); st_deviation flagged nothing, so its
    # 1 missed case gets a row of its own, without tier and with no items.
    assert y[["screen", "items", "missed_cases_of_screen"]].values.tolist() == [
        ["hyperkalemia", 6, 2], ["st_deviation", 0, 1]]
    assert pd.isna(y["tier"].iloc[1]) and pd.isna(y["ppv"].iloc[1])
    # The window applies to when a missed case was recorded: none before 2026-03-03 09:00.
    assert store.yield_table(engine, until="2026-03-03T09:00:00Z")["missed_cases_of_screen"].tolist() == [0]


@pytest.mark.parametrize("screen, role, note, at, why", [
    ("qt_long", "registrar", None, "2026-03-03T09:00:00Z", "unknown screen"),
    ("long_qt", " ", None, "2026-03-03T09:00:00Z", "reviewer role is required"),
    ("long_qt", "r" * 129, None, "2026-03-03T09:00:00Z", "reviewer role longer than 128 characters"),
    ("long_qt", "registrar", "bad\x00note", "2026-03-03T09:00:00Z", "note holds a NUL byte"),
    ("long_qt", "registrar", None, "2026-03-03T09:00:00", "UTC offset"),
])
def test_a_bad_missed_case_is_refused_naming_the_field_not_its_value(sqlite_engine, screen, role, note, at, why):
    with pytest.raises(ValueError, match=why) as raised:
        store.record_missed_case(sqlite_engine, "secret-patient", "secret-ecg", screen, role, note, pd.Timestamp(at))
    assert "secret" not in str(raised.value) and "qt_long" not in str(raised.value)


def test_review_missed_records_a_case_from_the_command_line(tmp_path, capsys):
    from tests.test_commands import run

    open_store(store.sqlite_url(tmp_path)).dispose()
    argv = ["review", "--missed", "--patient", "pat-Z", "--ecg", "ecg-Z", "--screen", "long_qt", "--role", "registrar",
            "--note", "QTc 540 on a manual read", "--at", "2026-03-03T09:00:00Z", "--out", tmp_path]
    assert run(capsys, *argv)[:2] == (0, "missed case recorded\n")
    assert run(capsys, *argv)[:2] == (0, "missed case already recorded\n")
    code, _, err = run(capsys, "review", "--missed", "--patient", "pat-Z", "--out", tmp_path)
    assert code == 2 and "--ecg, --screen and --role are required" in err and "pat-Z" not in err
    code, text, _ = run(capsys, "yield", "--out", tmp_path, "--format", "json")
    assert [(r["screen"], r["items"], r["missed_cases_of_screen"]) for r in json.loads(text)["rows"]] == [("long_qt", 0, 1)]


def test_the_audits_period_readers_select_in_sql_on_both_dialects(engine):
    from cardiosieve.pipeline.store import read_finding_history, read_items_between

    night_with_history(engine, NIGHT)         # ECGs of 2026-03-01 10:00-12:00, flagged at NIGHT1
    h = read_finding_history(engine, "2026-03-01T10:30:00Z", "2026-03-01T12:00:00Z", with_texts=True)
    assert h["ecg_id"].tolist() == ["e3"]     # 11:00 in; 10:00 before the period; 12:00 is its open end
    assert str(h["acquired_at"].dt.tz) == "UTC" and str(h["run_end_at"].dt.tz) == "UTC"
    assert "rule_version" in json.loads(h["evidence"].iloc[0])         # the texts, with_texts
    # The folded e1 + e2 item shows its most severe finding's ECG, e1 at 10:00.
    assert read_items_between(engine, "2026-03-01T10:01:00Z", "2026-03-02", column="ecg_at")["ecg_id"].tolist() \
        == ["e3"]
    assert sorted(read_items_between(engine, "2026-03-01T10:00:00Z", "2026-03-02", column="ecg_at")["ecg_id"]) \
        == ["e1", "e3"]
    assert len(read_items_between(engine, NIGHT1, NIGHT1 + pd.Timedelta(seconds=1))) == 2
    assert read_items_between(engine, NIGHT1 + pd.Timedelta(seconds=1), "2027-01-01").empty
    with pytest.raises(ValueError, match="not a time column"):
        read_items_between(engine, NIGHT1, NIGHT1, column="rank")
