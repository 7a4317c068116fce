"""Review timeliness (pipeline/audit.py, `cardiosieve audit`): hand-computed counts, hours and
percentiles on small invented histories."""
from __future__ import annotations

import json

import pandas as pd
import pytest

from cardiosieve.pipeline.audit import TIMELINESS_COLUMNS, review_timeliness
from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK, main
from cardiosieve.pipeline.config import DEFAULT_AUDIT, settings_from_dict
from cardiosieve.pipeline.store import open_store, record_review
from tests.test_store import finding, night

TARGETS = {1: 1.0, 2: 12.0, 3: 72.0, 4: 168.0}
NOV = pd.Timestamp("2026-11-02 00:00", tz="UTC")
AS_OF = pd.Timestamp("2026-12-20 00:00", tz="UTC")


def _item(i, tier, flagged, status="closed", screen="long_qt"):
    return {"item_id": f"i{i}", "screen": screen, "tier": tier, "status": status,
            "first_flagged_at": pd.Timestamp(flagged)}


def _review(i, at, tier_at_review=None):
    return {"item_id": f"i{i}", "reviewed_at": pd.Timestamp(at), "tier_at_review": tier_at_review}


def test_counts_hours_and_the_90th_percentile_by_hand():
    h = pd.Timedelta(hours=1)
    items = pd.DataFrame([
        _item(1, 1, NOV), _item(2, 1, NOV), _item(3, 1, NOV), _item(4, 1, NOV, status="open"),
        _item(5, 2, NOV), _item(6, 2, AS_OF - h, status="open"), _item(7, 2, NOV, status="explained"),
        _item(8, 1, "2026-12-01 06:00+00:00"),
    ])
    reviews = pd.DataFrame([
        _review(1, NOV + 0.5 * h), _review(2, NOV + 2 * h), _review(3, NOV + 3 * h),
        _review(3, NOV + 30 * h),                       # a later review: the first one counts
        _review(5, NOV + 10 * h), _review(8, pd.Timestamp("2026-12-01 10:00+00:00")),
    ])
    raw = review_timeliness(items, reviews, TARGETS, AS_OF)
    assert list(raw.columns) == TIMELINESS_COLUMNS
    got = raw.set_index(["tier", "month"])
    t1 = got.loc[(1, "2026-11")]
    # Tier 1 (target 1 h): first reviews after 0.5, 2 and 3 h, so two late; item 4 never
    # reviewed and weeks past its target: overdue. Median 2.0 h; 90th percentile by linear
    # interpolation, definition 7 of [HYNDMAN-FAN-1996]: position 0.9 x (3 - 1) = 1.8 between 2
    # and 3 -> 2.8 h (worked by hand).
    assert (t1["items"], t1["reviewed"], t1["reviewed_late"], t1["overdue"], t1["pending"]) == (4, 3, 2, 1, 0)
    assert t1["median_h_to_review"] == pytest.approx(2.0) and t1["p90_h_to_review"] == pytest.approx(2.8)
    t2 = got.loc[(2, "2026-11")]
    # Tier 2 (target 12 h): item 5 reviewed after 10 h, in time; item 7 explained away unreviewed.
    assert (t2["items"], t2["reviewed"], t2["reviewed_late"], t2["overdue"], t2["explained_unreviewed"]) == (2, 1, 0, 0, 1)
    assert t2["median_h_to_review"] == pytest.approx(10.0)
    # Item 6: flagged an hour before the audit, within its 12 h: pending, not missed.
    dec2 = got.loc[(2, "2026-12")]
    assert (dec2["items"], dec2["reviewed"], dec2["overdue"], dec2["pending"]) == (1, 0, 0, 1)
    assert pd.isna(dec2["median_h_to_review"]) and pd.isna(dec2["p90_h_to_review"])
    dec1 = got.loc[(1, "2026-12")]
    assert (dec1["reviewed"], dec1["reviewed_late"], dec1["median_h_to_review"]) == (1, 1, 4.0)


def test_the_tier_at_review_sets_the_target_when_it_was_recorded():
    # Tier 1 now, tier 2 when reviewed 5 h after flagging: within tier 2's 12 h, not late.
    items = pd.DataFrame([_item(1, 1, NOV)])
    reviews = pd.DataFrame([_review(1, NOV + pd.Timedelta(hours=5), tier_at_review=2)])
    got = review_timeliness(items, reviews, TARGETS, AS_OF)
    assert got[["tier", "reviewed", "reviewed_late", "target_h"]].values.tolist() == [[2, 1, 0, 12.0]]


def test_no_items_is_an_empty_table_with_the_columns():
    got = review_timeliness(pd.DataFrame(columns=["item_id", "screen", "tier", "status", "first_flagged_at"]),
                            pd.DataFrame(), TARGETS, AS_OF)
    assert got.empty and list(got.columns) == TIMELINESS_COLUMNS


def test_the_site_sets_its_own_targets_and_a_bad_one_is_refused():
    s = settings_from_dict({"audit": {"review_target_h_tier_1": 0.5}})
    assert s.review_target_h() == {**TARGETS, 1: 0.5}
    assert settings_from_dict({}).review_target_h() == {int(k[-1]): v for k, v in DEFAULT_AUDIT.items()
                                                        if k.startswith("review_target_h_tier_")}
    for bad in ({"review_target_h_tier_5": 1}, {"review_target_h_tier_1": 0}, {"review_target_h_tier_2": "soon"}):
        with pytest.raises(ValueError, match=r"\[audit\]"):
            settings_from_dict({"audit": bad})


# --- the command, over a store built as the nightly runs build it ---------------------------------
@pytest.fixture
def store(tmp_path):
    url = f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    engine = open_store(url)
    flagged = pd.Timestamp("2026-11-03 02:00", tz="UTC")   # the night's end: first_flagged_at
    items, _ = night(engine, [finding("e1", "pat-Ada", "2026-11-02 20:00", tier=1),
                              finding("e2", "pat-Bo", "2026-11-02 21:00", tier=1),
                              finding("e3", "pat-Cy", "2026-11-02 22:00", tier=2)], now=flagged)
    ids = items.set_index("ecg_id")["item_id"]
    record_review(engine, ids["e1"], "finding_real", "registrar", None, flagged + pd.Timedelta(minutes=30))
    record_review(engine, ids["e2"], "finding_not_real", "registrar", None, flagged + pd.Timedelta(hours=6))
    engine.dispose()
    return url, tmp_path


def test_audit_prints_counts_per_screen_and_tier_and_names_no_patient(store, capsys):
    url, _ = store
    code = main(["audit", "--db", url, "--since", "2026-11-01", "--until", "2026-12-01", "--format", "json"])
    out = capsys.readouterr().out
    assert code == EXIT_OK
    got = {r["tier"]: r for r in json.loads(out)["timeliness"]}
    # Tier 1: reviewed after 0.5 h and 6 h, target 1 h: one late. Tier 2: never reviewed, weeks
    # past its 12 h: overdue.
    assert (got[1]["items"], got[1]["reviewed"], got[1]["reviewed_late"]) == (2, 2, 1)
    assert got[1]["median_h_to_review"] == pytest.approx(3.25)
    assert (got[2]["items"], got[2]["reviewed"], got[2]["overdue"]) == (1, 0, 1)
    assert "pat-" not in out and "wl-" not in out
    code = main(["audit", "--db", url, "--since", "2026-11-01", "--until", "2026-12-01"])
    text = capsys.readouterr().out
    assert code == EXIT_OK and text.startswith("Screening aid") and "hyperkalemia" in text and "pat-" not in text


def test_audit_takes_the_sites_targets_from_its_config(store, capsys):
    url, tmp_path = store
    (tmp_path / "site.toml").write_text("[audit]\nreview_target_h_tier_1 = 8\n")
    main(["audit", "--db", url, "--since", "2026-11-01", "--until", "2026-12-01", "--format", "json",
          "--config", str(tmp_path / "site.toml")])
    rows = json.loads(capsys.readouterr().out)["timeliness"]
    assert [r["reviewed_late"] for r in rows if r["tier"] == 1] == [0]      # 6 h is within 8 h


@pytest.mark.parametrize("since,until,why", [("2026-12-01", "2026-11-01", "period is empty"),
                                             ("last week", None, "not a date")])
def test_a_bad_period_is_exit_2_with_one_line(store, capsys, since, until, why):
    url, _ = store
    argv = ["audit", "--db", url, "--since", since] + (["--until", until] if until else [])
    assert main(argv) == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert why in err and len(err.strip().splitlines()) == 1
