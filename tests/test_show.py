"""`cardiosieve show`: the list a person reads each morning, one item in full, filters, time
zones, JSON and CSV; and `yield --format`. Invented patients."""
import csv
import io
import json

import pandas as pd
import pytest

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.store import open_store, read_items, record_review, sqlite_url, upsert_items
from cardiosieve.pipeline.worklist import build_items
from cardiosieve.screens import FINDING_COLUMNS

NIGHT = pd.Timestamp("2026-07-02 02:00", tz="UTC")          # British Summer Time: UTC+1
LONG_SUMMARY = ("QTc 532 ms (Fridericia; QT 480 ms, heart rate 72 bpm), above 500 ms; modifiers: female, "
                "potassium 3.1 mmol/L, two QT-prolonging drugs in the 24 h before; Tisdale 9 (moderate)")


def finding(ecg_id, patient_id, screen, tier, at, *, sex=None, age=None, summary=None,
            caveats=(), rules=()):
    values = {"qtc_ms": 532.0}
    if sex is not None:
        values["sex"] = sex
    if age is not None:
        values["age_years"] = age
    parts = {"severity": 0.6, "lab_confirmed": 1, "lab_gap_min": 30}
    return {"ecg_id": ecg_id, "patient_id": patient_id, "acquired_at": pd.Timestamp(at, tz="UTC"), "screen": screen,
            "tier": tier, "score_parts": json.dumps(parts), "summary": summary or f"{screen} finding",
            "evidence": json.dumps({"rule_version": f"{screen}/1.0.0", "values": values, "rules": list(rules)}),
            "caveats": json.dumps(list(caveats)), "territories": "", "rule_version": f"{screen}/1.0.0"}


QTC_RULE = {"key": "qtc_high_risk", "op": ">", "value": 500, "unit": "ms", "source": "AHA-2010-TDP"}


@pytest.fixture
def out(tmp_path):
    rows = [
        finding("e-lqt", "pat-Ada", "long_qt", 2, "2026-07-01 23:30", sex="F", age=74,
                summary=LONG_SUMMARY, caveats=["Magnesium not measured in the window: its effect is unknown."],
                rules=[QTC_RULE]),
        finding("e-st", "pat-Bo", "st_deviation", 1, "2026-07-01 14:05", sex="M", age=58),
        finding("e-hk", "pat-Cy", "hyperkalemia", 3, "2026-07-01 09:00"),          # no sex, age or location
        finding("e-hk2", "pat-Di", "hyperkalemia", 2, "2026-07-01 10:00", sex="F", age=40),
    ]
    f = pd.DataFrame(rows, columns=FINDING_COLUMNS)
    # The care location reaches the item from the aligned table (pipeline/worklist.build_items).
    aligned = pd.DataFrame({"ecg_id": ["e-lqt", "e-st", "e-hk", "e-hk2"],
                            "location": ["Ward 7 (cardiology)", "ED", None, "=HYPERLINK(1)"]})
    upsert_items(open_store(sqlite_url(tmp_path)), build_items(f, aligned, None, "run-1", NIGHT))
    return tmp_path


@pytest.fixture(autouse=True)
def terminal_width(monkeypatch):
    """Text output wraps at the terminal's width (commands._width): fix it, so that a test's
    expected line does not depend on the terminal pytest (or its worker process) runs in."""
    monkeypatch.setenv("COLUMNS", "100")


def show(capsys, *argv):
    code = main(["show", *map(str, argv)])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def item_of(out, patient):
    items = read_items(open_store(sqlite_url(out)))
    return items.set_index("patient_id").loc[patient, "item_id"]


def test_the_list_gives_id_whole_summary_caveats_location_age_and_sex(out, capsys):
    code, text, err = show(capsys, "--out", out)
    assert code == 0 and err == ""
    assert text.startswith(CAUTION)
    assert item_of(out, "pat-Ada") in text
    flat = " ".join(text.split())                                   # the summary is wrapped, not cut
    assert LONG_SUMMARY in flat and "..." not in text
    assert "caveat: Magnesium not measured in the window: its effect is unknown." in flat
    assert "female, 74 y" in text and "location Ward 7 (cardiology)" in text
    assert "male, 58 y" in text and "location ED" in text
    # An item whose record lacks them says so, never blank.
    assert "sex unknown, age unknown  location unknown" in text
    assert max(len(line) for line in text.splitlines()[1:-1]) <= 110


def test_the_list_is_in_rank_order_with_tier_1_first(out, capsys):
    _, text, _ = show(capsys, "--out", out)
    headers = [line.split() for line in text.splitlines() if line.startswith("#")]
    assert [h[0] for h in headers] == ["#1", "#2", "#3", "#4"]
    assert [h[2] for h in headers] == ["1", "2", "2", "3"]
    assert headers[0][3] == "st_deviation"


def test_times_are_in_the_site_time_zone_with_the_offset(out, capsys, tmp_path):
    _, utc, _ = show(capsys, "--out", out, "--screen", "long_qt")
    _, london, _ = show(capsys, "--out", out, "--screen", "long_qt", "--timezone", "Europe/London")
    assert "at 2026-07-01 23:30 +00:00" in utc
    assert "at 2026-07-02 00:30 +01:00" in london and london.splitlines()[-1].count("times in Europe/London") == 1
    site = tmp_path / "site.toml"
    site.write_text('[site]\nname = "Fellgate"\ntimezone = "America/New_York"\n')
    _, ny, _ = show(capsys, "--out", out, "--screen", "long_qt", "--config", site)
    assert "at 2026-07-01 19:30 -04:00" in ny


def test_an_unknown_time_zone_is_exit_2(out, capsys):
    code, _, err = show(capsys, "--out", out, "--timezone", "Mars/Olympus")
    assert code == 2 and "time zone" in err


@pytest.mark.parametrize("argv, patients", [
    (["--screen", "hyperkalemia"], {"pat-Cy", "pat-Di"}),
    (["--screen", "hyperkalemia", "--screen", "long_qt"], {"pat-Ada", "pat-Cy", "pat-Di"}),
    (["--tier", "2"], {"pat-Ada", "pat-Di"}),
    (["--tier", "1", "--tier", "3"], {"pat-Bo", "pat-Cy"}),
    (["--location", "ward"], {"pat-Ada"}),                   # case-insensitive; unknown never matches
    (["--location", "ed", "--tier", "2"], set()),
    (["--screen", "hyperkalemia", "--tier", "2"], {"pat-Di"}),
])
def test_filters_combine(out, capsys, argv, patients):
    code, text, _ = show(capsys, "--out", out, "--format", "json", *argv)
    got = json.loads(text)
    assert code == 0 and {i["patient_id"] for i in got["items"]} == patients
    assert got["matching"] == len(patients) and got["stored"] == 4


def test_status_filter_and_closed_items(out, capsys):
    engine = open_store(sqlite_url(out))
    record_review(engine, item_of(out, "pat-Bo"), "finding_real", "registrar", None,
                  pd.Timestamp("2026-07-02 08:00", tz="UTC"))
    _, default, _ = show(capsys, "--out", out, "--format", "json")
    _, closed, _ = show(capsys, "--out", out, "--format", "json", "--status", "closed")
    assert "pat-Bo" not in {i["patient_id"] for i in json.loads(default)["items"]}
    assert [i["patient_id"] for i in json.loads(closed)["items"]] == ["pat-Bo"]


def test_unknown_screen_or_status_is_exit_2_naming_the_known_ones(out, capsys):
    code, _, err = show(capsys, "--out", out, "--screen", "hyperkalaemia")
    assert code == 2 and "st_deviation" in err
    code, _, err = show(capsys, "--out", out, "--status", "pending")
    assert code == 2 and "reopened" in err


def test_one_item_in_full_has_criteria_values_and_reviews(out, capsys):
    item = item_of(out, "pat-Ada")
    record_review(open_store(sqlite_url(out)), item, "already_known", "cardiology registrar", "on the drug chart",
                  pd.Timestamp("2026-07-02 08:15", tz="UTC"))
    code, text, _ = show(capsys, item, "--out", out, "--timezone", "Europe/London")
    assert code == 0 and text.startswith(CAUTION)
    assert "qtc_high_risk" in text and "> 500 ms  [AHA-2010-TDP]" in text
    assert "qtc_ms" in text and "532" in text
    assert "prior ECG: unknown" in text
    assert "2026-07-02 09:15 +01:00  already_known  by cardiology registrar (cli): on the drug chart" in text
    assert "status reason: reviewed: already_known" in text


def test_one_item_as_json_carries_its_reviews_and_parsed_evidence(out, capsys):
    item = item_of(out, "pat-Ada")
    record_review(open_store(sqlite_url(out)), item, "finding_real", "registrar", None,
                  pd.Timestamp("2026-07-02 08:15", tz="UTC"))
    code, text, _ = show(capsys, item, "--out", out, "--format", "json", "--timezone", "Europe/London")
    got = json.loads(text)
    assert code == 0 and got["caution"] == CAUTION
    record = got["item"]
    assert record["item_id"] == item and record["evidence"]["rules"] == [QTC_RULE]
    assert record["caveats"] == ["Magnesium not measured in the window: its effect is unknown."]
    assert record["ecg_at"] == "2026-07-02T00:30:00+01:00"
    assert [r["outcome"] for r in record["reviews"]] == ["finding_real"]
    assert record["reviews"][0]["reviewed_at"] == "2026-07-02T09:15:00+01:00"


def test_an_unknown_item_is_exit_2(out, capsys):
    code, text, err = show(capsys, "wl-0000000000000000", "--out", out)
    assert code == 2 and text == "" and "no item wl-0000000000000000" in err


def test_a_missing_store_is_exit_2_naming_it(tmp_path, capsys):
    code, _, err = show(capsys, "--db", f"sqlite:///{tmp_path / 'typo.sqlite'}")
    assert code == 2 and "typo.sqlite" in err
    assert not (tmp_path / "typo.sqlite").exists()


def test_csv_is_spreadsheet_safe_and_carries_the_caution(out, capsys):
    code, text, _ = show(capsys, "--out", out, "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(text)))
    assert code == 0 and len(rows) == 4
    assert {r["caution"] for r in rows} == {CAUTION}
    by_patient = {r["patient_id"]: r for r in rows}
    assert by_patient["pat-Di"]["location"] == "'=HYPERLINK(1)"          # neutralised, not run
    assert by_patient["pat-Ada"]["age_years"] == "74" and by_patient["pat-Cy"]["sex"] == ""
    assert by_patient["pat-Ada"]["summary"] == LONG_SUMMARY


def test_yield_as_json_and_csv_match_the_table(out, capsys):
    record_review(open_store(sqlite_url(out)), item_of(out, "pat-Ada"), "finding_real", "registrar", None,
                  pd.Timestamp("2026-07-02 04:00", tz="UTC"))
    assert main(["yield", "--out", str(out), "--format", "json"]) == 0
    got = json.loads(capsys.readouterr().out)
    row = {(r["screen"], r["tier"]): r for r in got["rows"]}[("long_qt", 2)]
    assert (row["items"], row["reviewed"], row["finding_real"], row["ppv"]) == (1, 1, 1, 1.0)
    assert row["ppv_low"] == pytest.approx(0.2065, abs=1e-4)     # Wilson 1/1 [WILSON-1927]: z^2/(1+z^2), by hand
    assert {(r["screen"], r["tier"]) for r in got["rows"]} == {("hyperkalemia", 2), ("hyperkalemia", 3),
                                                                ("long_qt", 2), ("st_deviation", 1)}
    assert row_unreviewed_is_null(got)
    assert main(["yield", "--out", str(out), "--format", "csv"]) == 0
    table = pd.read_csv(io.StringIO(capsys.readouterr().out))
    assert len(table) == 4 and table.loc[table["screen"].eq("long_qt"), "ppv"].item() == 1.0


def row_unreviewed_is_null(got) -> bool:
    """No review yet: the PPV is unknown (null), not 0."""
    row = {(r["screen"], r["tier"]): r for r in got["rows"]}[("st_deviation", 1)]
    return row["ppv"] is None and row["ppv_low"] is None


def test_yield_of_a_store_with_no_items_says_so(tmp_path, capsys):
    open_store(sqlite_url(tmp_path)).dispose()                 # a store made by a run that flagged nothing
    assert main(["yield", "--out", str(tmp_path), "--since", "2026-07-01"]) == 0
    assert capsys.readouterr().out.splitlines()[0] == "no items flagged since 2026-07-01"
