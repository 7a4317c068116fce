"""`cardiosieve replay` (pipeline/replay.py) and the aligned archive it reads (pipeline/archive.py),
over a small history built as a site builds one: three nights through `cardiosieve run` on an
invented lake, outcomes through `cardiosieve review`, a missed case through `review --missed`.

The lake (tests/lake_builders.py; every ECG dull, QTc 400 ms, no ECG sign of hyperkalaemia, so a
finding comes only from what is planted). Bands of screens/rules.toml [hyperkalemia] [UKKA-2020]:
mild k_mild >= 5.5 (tier 4), moderate >= 6.0 (tier 3), severe >= 6.5 (tier 2); long QT: QT 520 ms
at RR 1000 ms is QTc 520 ms by any correction, above qtc_high_risk 500 ms [AHA-2010-TDP] (tier 1).

    night 2026-11-02  E1 pat-ann K 6.8 (severe)   E2 pat-bob K 5.7 (mild)   E3 pat-cat QT 520 ms
    night 2026-11-03  E4 pat-dan K 5.6 (mild)     E5 pat-eve K 5.3 (none)   E6 pat-fay K 4.2
    night 2026-11-04  E7 pat-gus K 6.1 (moderate)

Reviews: E1 finding_real, E2 finding_not_real, E3 already_known, E4 finding_real, E7 finding_real.
Missed: E5 recorded as missed by hyperkalemia.
"""
from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
from pathlib import Path

import pandas as pd
import pytest
from markupsafe import escape

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.archive import ARCHIVE_ALIGNED, ARCHIVE_DIR, ARCHIVE_LEADS, archive_folders
from cardiosieve.pipeline.cli import EXIT_BAD_INPUT, EXIT_OK, main
from cardiosieve.pipeline.config import load_settings
from cardiosieve.pipeline.store import open_store, read_finding_history, read_items, sqlite_url
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake
from tests.modes import mode

NIGHTS = [("2026-11-02", "2026-11-03"), ("2026-11-03", "2026-11-04"), ("2026-11-04", "2026-11-05")]
PERIOD = ["--since", "2026-11-02", "--until", "2026-11-05"]          # 3 days
PLANTED = [  # ecg, patient, night, potassium (mmol/L), qt (ms)
    ("E1", "pat-ann", 0, 6.8, 400.0), ("E2", "pat-bob", 0, 5.7, 400.0), ("E3", "pat-cat", 0, 4.2, 520.0),
    ("E4", "pat-dan", 1, 5.6, 400.0), ("E5", "pat-eve", 1, 5.3, 400.0), ("E6", "pat-fay", 1, 4.2, 400.0),
    ("E7", "pat-gus", 2, 6.1, 400.0),
]
OUTCOMES = {"E1": "finding_real", "E2": "finding_not_real", "E3": "already_known", "E4": "finding_real",
            "E7": "finding_real"}


def _lake(root: Path) -> Path:
    ecg, labs = [], []
    for i, (eid, pid, night, k, qt) in enumerate(PLANTED):
        day = NIGHTS[night][0]
        ecg.append(ecg_row(eid, pid, f"{day}T{10 + i:02d}:00:00Z", qt_ms=qt))
        labs.append(lab_row(f"R{i}", pid, f"{day}T{9 + i:02d}:00:00Z", value=k))
    return write_lake(root / "lake", ecg=ecg, labs=labs, patients=[patient_row(p[1]) for p in PLANTED])


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    root = tmp_path_factory.mktemp("replay")
    lake = _lake(root)
    out = root / "out"
    for start, end in NIGHTS:
        assert main(["--quiet", "run", "--lake", str(lake), "--out", str(out), "--start", start, "--end", end]) == 0
    engine = open_store(sqlite_url(out), create=False)
    items = read_items(engine)
    engine.dispose()
    item_of = items.set_index("ecg_id")["item_id"]
    for k, (eid, outcome) in enumerate(OUTCOMES.items()):
        assert main(["review", item_of[eid], "--outcome", outcome, "--role", "registrar", "--out", str(out),
                     "--at", f"2026-11-06T0{k}:00:00Z"]) == 0
    assert main(["review", "--missed", "--patient", "pat-eve", "--ecg", "E5", "--screen", "hyperkalemia",
                 "--role", "registrar", "--out", str(out), "--at", "2026-11-06T09:00:00Z"]) == 0
    return {"root": root, "lake": lake, "out": out, "item_of": item_of}


def _whatif(tmp_path, text: str) -> str:
    path = tmp_path / "whatif.toml"
    path.write_text(text)
    return str(path)


def _replay_json(capsys, h, whatif, *extra, out=None):
    code = main(["--quiet", "replay", "--out", str(out or h["out"]), "--lake", str(h["lake"]), *PERIOD,
                 "--rules", whatif, "--format", "json", *extra])
    captured = capsys.readouterr()
    assert code == EXIT_OK, captured.err
    return json.loads(captured.out), captured.out


def _live_latest(out) -> set:
    engine = open_store(sqlite_url(out), create=False)
    try:
        h = read_finding_history(engine)
    finally:
        engine.dispose()
    latest = h.drop_duplicates(["ecg_id", "screen"], keep="last")
    return set(zip(latest["ecg_id"], latest["screen"], latest["tier"].astype(int)))


def _replayed(out, lake) -> tuple[set, object]:
    from cardiosieve.pipeline.replay import read_period, screen_period
    from cardiosieve.pipeline.run import parse_instant, site_rules
    from cardiosieve.screens import SCREENS

    settings = load_settings(None)
    period = read_period(out, lake, parse_instant(PERIOD[1], "since"), parse_instant(PERIOD[3], "until"), settings)
    found = screen_period(period, site_rules(settings), list(SCREENS))
    return set(zip(found["ecg_id"], found["screen"], found["tier"].astype(int))), period


# --- (vi) the archive ------------------------------------------------------------------------------
def test_every_night_leaves_an_owner_only_archive_folder_with_its_interval(history):
    folders = archive_folders(history["out"])
    assert [(f["lo"].strftime("%Y-%m-%d"), f["hi"].strftime("%Y-%m-%d")) for f in folders] == NIGHTS
    for f in folders:
        assert mode(f["path"]) == 0o700
        assert mode(f["path"] / ARCHIVE_ALIGNED) == 0o600 and mode(f["path"] / ARCHIVE_LEADS) == 0o600
    first = pd.read_parquet(folders[0]["path"] / ARCHIVE_ALIGNED)
    assert sorted(first["ecg_id"]) == ["E1", "E2", "E3"]
    leads = pd.read_parquet(folders[0]["path"] / ARCHIVE_LEADS)
    assert len(leads) == 3 * 12 and set(leads["ecg_id"]) == {"E1", "E2", "E3"}   # 12 standard leads each


def test_the_dag_stage_path_writes_the_archive_and_a_rerun_replaces_its_own_folder(history, tmp_path):
    from cardiosieve.pipeline import run as r

    out, lake = tmp_path / "staged", str(history["lake"])
    a, b = r.interval(*NIGHTS[0])

    def staged_night():                   # what the Airflow tasks call, one stage after another
        loaded = r.stage_load(lake, out, a, b)
        summary = {"tables": loaded["tables"], "quality": r.stage_quality(lake, out, a, b),
                   "aligned": r.stage_align(out, a, b, lake=lake)}
        summary["findings"] = r.stage_screen(out, a, b)["by_screen_tier"]
        summary["worklist"] = r.stage_worklist(out, a, b)
        r.stage_finish(out, a, b, summary)

    staged_night()
    (first,) = archive_folders(out)
    assert first["path"].name == r.chunk_run_id(a, b)
    d = r.stage_dir(out, a, b)
    pd.testing.assert_frame_equal(pd.read_parquet(first["path"] / ARCHIVE_ALIGNED), pd.read_parquet(d / "aligned.parquet"))
    pd.testing.assert_frame_equal(pd.read_parquet(first["path"] / ARCHIVE_LEADS), r.screen_leads(d))
    staged_night()
    (again,) = archive_folders(out)
    assert again["path"] == first["path"] and again["written_at_ns"] > first["written_at_ns"]
    assert [p.name for p in (out / ARCHIVE_DIR).iterdir()] == [first["path"].name]   # nothing left aside


def test_an_ecg_in_several_archive_folders_comes_from_the_one_written_last(history, tmp_path):
    # The first night's archived rows written twice: as a 3-day backfill chunk with E2's potassium
    # at 5.7 mmol/L, and as a rerun of the night with 6.2 (as if a corrected result had arrived).
    from cardiosieve.pipeline.archive import archive_chunk
    from cardiosieve.pipeline.replay import read_period
    from cardiosieve.pipeline.run import interval

    (night,) = [f for f in archive_folders(history["out"]) if f["lo"].day == 2]
    aligned = pd.read_parquet(night["path"] / ARCHIVE_ALIGNED)
    leads = pd.read_parquet(night["path"] / ARCHIVE_LEADS)
    corrected = aligned.assign(k_mmol_l=aligned["k_mmol_l"].where(aligned["ecg_id"] != "E2", 6.2))
    lo, hi = interval(NIGHTS[0][0], NIGHTS[2][1])

    def k_of_e2(first, second):
        out = tmp_path / f"out-{len(list(tmp_path.iterdir()))}"
        archive_chunk(out, lo, hi, first, leads)                       # the backfill chunk [2, 5)
        archive_chunk(out, *interval(*NIGHTS[0]), second, leads)       # the night [2, 3), later
        period = read_period(out, None, lo, hi, load_settings(None))
        assert period.uncovered == [] and sorted(period.aligned["ecg_id"]) == ["E1", "E2", "E3"]
        assert len(period.leads) == 3 * 12                             # one copy of each ECG's leads
        return float(period.aligned.set_index("ecg_id").loc["E2", "k_mmol_l"])

    assert k_of_e2(aligned, corrected) == 6.2
    assert k_of_e2(corrected, aligned) == 5.7


# --- (i) the shipped rules reproduce the live findings ----------------------------------------------
def test_an_empty_whatif_reproduces_the_live_findings_from_the_archive_and_from_the_lake(history, tmp_path):
    live = _live_latest(history["out"])
    assert live == {("E1", "hyperkalemia", 2), ("E2", "hyperkalemia", 4), ("E3", "long_qt", 1),
                    ("E4", "hyperkalemia", 4), ("E7", "hyperkalemia", 3)}
    got, period = _replayed(history["out"], history["lake"])
    assert got == live and period.archived_ecgs == 7 and period.realigned_ecgs == 0
    # No archive at all (OUT holding only the store): every night re-loaded and re-aligned.
    bare = tmp_path / "bare"
    bare.mkdir()
    shutil.copy(history["out"] / "worklist.sqlite", bare / "worklist.sqlite")
    got, period = _replayed(bare, history["lake"])
    assert got == live and period.archived_ecgs == 0 and period.realigned_ecgs == 7
    assert [(a.day, b.day) for a, b in period.uncovered] == [(2, 5)]
    # One night's folder deleted: that night from the lake, the others from the archive.
    part = tmp_path / "part"
    shutil.copytree(history["out"], part, symlinks=True)
    shutil.rmtree(part / ARCHIVE_DIR / "20261103T000000Z_20261104T000000Z")
    got, period = _replayed(part, history["lake"])
    assert got == live and (period.archived_ecgs, period.realigned_ecgs) == (4, 3)


def test_an_empty_whatif_agrees_with_the_live_history_in_every_screen(history, tmp_path, capsys):
    report, text = _replay_json(capsys, history, _whatif(tmp_path, ""))
    assert report["caution"] == CAUTION and report["screens_rescreened"] == []
    rows = {r["screen"]: r for r in report["screens"]}
    hk = rows["hyperkalemia"]
    assert (hk["findings_current"], hk["findings_alternative"], hk["items_current"], hk["items_alternative"]) == (4, 4, 4, 4)
    assert hk["items_per_day_current"] == pytest.approx(4 / 3)
    assert (hk["live_ecgs"], hk["live_same_tier"], hk["live_other_tier"], hk["live_only"], hk["replay_only"]) == (4, 4, 0, 0, 0)
    assert hk["live_agreement_pct"] == 100.0
    assert (rows["long_qt"]["live_same_tier"], rows["st_deviation"]["live_ecgs"]) == (1, 0)
    assert "items" not in report and "pat-" not in text and "wl-" not in text    # counts only


# --- (ii) a raised and a lowered threshold ----------------------------------------------------------
def _wilson(k, n):
    from statsmodels.stats.proportion import proportion_confint
    return proportion_confint(k, n, alpha=0.05, method="wilson")


def test_raising_the_mild_band_loses_two_reviewed_items_with_their_outcomes_split(history, tmp_path, capsys):
    # k_mild 5.8: E2 (5.7, finding_not_real) and E4 (5.6, finding_real) are no longer flagged;
    # E1 (6.8) and E7 (6.1) are above it and stay.
    report, _ = _replay_json(capsys, history, _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.8\n"))
    assert report["screens_rescreened"] == ["hyperkalemia"]
    hk = {r["screen"]: r for r in report["screens"]}["hyperkalemia"]
    assert (hk["findings_current"], hk["findings_alternative"], hk["ecgs_lost"], hk["ecgs_gained"]) == (4, 2, 2, 0)
    assert (hk["items_current"], hk["items_alternative"], hk["items_change_pct"]) == (4, 2, -50.0)
    assert (hk["reviewed"], hk["reviewed_kept"], hk["reviewed_lost_real"], hk["reviewed_lost_not_real"],
            hk["reviewed_gained"]) == (4, 2, 1, 1, 0)
    # PPV current: E1, E4, E7 real of E1, E2, E4, E7 = 3/4; alternative: E1, E7 of E1, E7 = 2/2.
    assert hk["ppv_current"] == pytest.approx(0.75) and hk["ppv_alternative"] == pytest.approx(1.0)
    assert (hk["ppv_current_low"], hk["ppv_current_high"]) == pytest.approx(_wilson(3, 4))
    assert (hk["ppv_alternative_low"], hk["ppv_alternative_high"]) == pytest.approx(_wilson(2, 2))
    tiers = {(r["screen"], r["tier"]): r for r in report["tiers"]}
    assert (tiers[("hyperkalemia", 4)]["findings_current"], tiers[("hyperkalemia", 4)]["findings_alternative"]) == (2, 0)
    # The long-QT screen's rules did not change: it is not screened again and counts the same.
    lq = {r["screen"]: r for r in report["screens"]}["long_qt"]
    assert lq["rules_changed"] is False and lq["findings_current"] == lq["findings_alternative"] == 1


def test_lowering_the_mild_band_gains_the_missed_ecg(history, tmp_path, capsys):
    # k_mild 5.2: E5 (K 5.3), recorded as missed, is flagged; the reviewed items are all kept.
    report, _ = _replay_json(capsys, history, _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.2\n"), "--items")
    hk = {r["screen"]: r for r in report["screens"]}["hyperkalemia"]
    assert (hk["ecgs_gained"], hk["ecgs_lost"], hk["items_alternative"]) == (1, 0, 5)
    assert hk["items_per_day_alternative"] == pytest.approx(5 / 3)
    assert (hk["missed_cases"], hk["missed_flagged_current"], hk["missed_flagged_alternative"]) == (1, 0, 1)
    assert (hk["reviewed_kept"], hk["reviewed_lost_real"] + hk["reviewed_lost_not_real"]) == (4, 0)
    assert hk["ppv_alternative"] == pytest.approx(0.75)
    assert (hk["ppv_alternative_low"], hk["ppv_alternative_high"]) == pytest.approx(_wilson(3, 4))
    (row,) = report["items"]
    assert (row["screen"], row["change"], row["ecg_ids"], row["patient_id"], row["live_item_ids"]) == \
        ("hyperkalemia", "gained", "E5", "pat-eve", "")


def test_a_lost_reviewed_item_is_listed_with_its_live_item_and_outcome_only_with_items(history, tmp_path, capsys):
    whatif = _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.8\n")
    report, _ = _replay_json(capsys, history, whatif, "--items")
    rows = {r["ecg_ids"]: r for r in report["items"]}
    assert sorted(rows) == ["E2", "E4"] and {r["change"] for r in rows.values()} == {"lost"}
    assert rows["E2"]["live_item_ids"] == history["item_of"]["E2"] and rows["E2"]["live_outcomes"] == "finding_not_real"


def test_a_sweep_reports_workload_and_ppv_at_each_value(history, tmp_path, capsys):
    report, _ = _replay_json(capsys, history, _whatif(tmp_path, ""), "--sweep", "hyperkalemia.k_mild=5.2:5.8:0.3")
    got = [(r["value"], r["items"], r["reviewed_flagged"]) for r in report["sweep"]]
    # 5.2 flags E1 E2 E4 E5 E7; 5.5 (the shipped value) the four reviewed; 5.8 E1 and E7.
    assert got == [(5.2, 5, 4), (5.5, 4, 4), (5.8, 2, 2)]
    assert [r["ppv"] for r in report["sweep"]] == pytest.approx([0.75, 0.75, 1.0])
    assert (report["sweep"][2]["ppv_low"], report["sweep"][2]["ppv_high"]) == pytest.approx(_wilson(2, 2))


# --- (iii) the live store is left as it was ---------------------------------------------------------
def test_replay_leaves_the_store_byte_for_byte_and_the_published_files_as_they_were(history, tmp_path, capsys):
    out = history["out"]
    store = out / "worklist.sqlite"

    def tables():
        with sqlite3.connect(f"file:{store}?mode=ro", uri=True) as conn:
            names = [n for (n,) in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
            return {n: conn.execute(f'SELECT * FROM "{n}" ORDER BY 1').fetchall() for n in names}

    before, rows = hashlib.sha256(store.read_bytes()).hexdigest(), tables()
    published = {p.name: p.read_bytes() for p in (out / "current").resolve().iterdir()}
    _replay_json(capsys, history, _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.2\n"), "--items",
                 "--sweep", "hyperkalemia.k_mild=5.0:6.0:0.5")
    assert hashlib.sha256(store.read_bytes()).hexdigest() == before and tables() == rows
    assert {p.name: p.read_bytes() for p in (out / "current").resolve().iterdir()} == published
    assert not (out / "_stage" / "20261102T000000Z_20261105T000000Z").exists()


# --- (iv) bad arguments -----------------------------------------------------------------------------
BAD = [
    ("[rules.nosuch]\nk_mild = 5\n", [], "unknown screen"),
    ("[rules.hyperkalemia]\nk_nosuch = 5\n", [], "unknown key"),
    ("[windows]\nepisode_h = 24\n", [], "only [rules.<screen>]"),
    ("[rules.hyperkalemia]\nk_mild = \"high\"\n", [], "finite number"),
    ("[rules.hyperkalemia\n", [], "not valid TOML"),
    (None, [], "no such file"),
    ("", ["--sweep", "nosuch.k_mild=5:6:0.1"], "unknown screen"),
    ("", ["--sweep", "hyperkalemia.k_nosuch=5:6:0.1"], "no threshold"),
    ("", ["--sweep", "hyperkalemia.k_mild=5:20:1"], "within 0 to 15 mmol/L"),
    ("", ["--sweep", "hyperkalemia.k_mild=5:6:0"], "step must be above 0"),
    ("", ["--sweep", "hyperkalemia.k_mild=5:6:-0.1"], "step must be above 0"),
    ("", ["--sweep", "hyperkalemia.k_mild=5:6:0.001"], "at most 200"),
    ("", ["--sweep", "hyperkalemia.k_mild"], "screen.key=lo:hi:step"),
    ("", ["--since", "2026-11-05", "--until", "2026-11-02"], "period is empty"),
    ("", ["--since", "last week"], "not a date"),
    ("", ["--format", "html"], "give --output"),
]


@pytest.mark.parametrize("whatif,extra,why", BAD, ids=[b[2] + str(i) for i, b in enumerate(BAD)])
def test_a_bad_argument_is_exit_2_with_one_line_naming_no_patient(history, tmp_path, capsys, whatif, extra, why):
    rules = _whatif(tmp_path, whatif) if whatif is not None else str(tmp_path / "absent.toml")
    argv = ["replay", "--out", str(history["out"]), "--lake", str(history["lake"]), *PERIOD, "--rules", rules, *extra]
    assert main(argv) == EXIT_BAD_INPUT
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert why in err and len(err.splitlines()) == 1 and captured.out == ""
    assert "pat-" not in err and "E1" not in err


# --- (v) the offline HTML file ----------------------------------------------------------------------
def test_the_html_report_is_one_offline_file_with_the_caution_and_the_sweep_plot(history, tmp_path, capsys):
    import base64
    import re

    page = tmp_path / "replay.html"
    assert main(["--quiet", "replay", "--out", str(history["out"]), "--lake", str(history["lake"]), *PERIOD,
                 "--rules", _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.8\n"), "--format", "html",
                 "--sweep", "hyperkalemia.k_mild=5.2:5.8:0.3", "--output", str(page)]) == EXIT_OK
    assert capsys.readouterr().out == ""
    text = page.read_text(encoding="utf-8")
    assert mode(page) == 0o600
    assert "http://" not in text and "https://" not in text and "@import" not in text
    assert str(escape(CAUTION)) in text.split("<h1>")[0] and "pat-" not in text    # above the title
    (svg_b64,) = re.findall(r'src="data:image/svg\+xml;base64,([A-Za-z0-9+/=]+)"', text)
    svg = base64.b64decode(svg_b64).decode("utf-8")
    assert "<svg" in svg and 'href="http' not in svg and "url(http" not in svg
    assert "items per day" in svg


def test_text_and_csv_carry_the_caution(history, tmp_path, capsys):
    whatif = _whatif(tmp_path, "[rules.hyperkalemia]\nk_mild = 5.8\n")
    base = ["--quiet", "replay", "--out", str(history["out"]), "--lake", str(history["lake"]), *PERIOD, "--rules", whatif]
    assert main(base) == EXIT_OK
    text = capsys.readouterr().out
    assert text.startswith(CAUTION) and "reviewed_lost_real" in text and "pat-" not in text
    assert main([*base, "--format", "csv"]) == EXIT_OK
    from io import StringIO
    table = pd.read_csv(StringIO(capsys.readouterr().out))
    assert set(table["table"]) == {"screens", "tiers"} and table["caution"].eq(CAUTION).all()
    hk = table[(table["table"] == "screens") & (table["screen"] == "hyperkalemia")].iloc[0]
    assert (hk["reviewed_lost_real"], hk["reviewed_lost_not_real"]) == (1, 1)


# --- pieces ------------------------------------------------------------------------------------------
def test_a_sweep_includes_its_upper_bound_despite_float_steps():
    from cardiosieve.pipeline.replay import parse_sweep
    from cardiosieve.screens.criteria import load_rules

    rules = load_rules()
    # (0.3 - 0.1) / 0.1 is 1.9999999999999998 in binary floating point: still three values.
    assert parse_sweep("hyperkalemia.k_mild=0.1:0.3:0.1", rules).values == (0.1, 0.2, 0.3)
    assert parse_sweep("st_deviation.std_reciprocal=-100:-50:25", rules).values == (-100.0, -75.0, -50.0)
    assert len(parse_sweep("long_qt.qtc_high_risk=400:599:1", rules).values) == 200     # the cap, exactly
    one = parse_sweep("long_qt.qtc_high_risk=480:480:5", rules)
    assert (one.values, one.unit) == ((480.0,), "ms")


def test_the_parts_of_a_period_no_archive_folder_covers():
    from cardiosieve.pipeline.replay import uncovered_parts

    def t(day):
        return pd.Timestamp(f"2026-11-{day:02d}", tz="UTC")

    covered = [(t(3), t(5)), (t(4), t(6)), (t(8), t(9)), (t(20), t(25))]
    assert uncovered_parts(t(1), t(10), covered) == [(t(1), t(3)), (t(6), t(8)), (t(9), t(10))]
    assert uncovered_parts(t(3), t(6), covered) == []
    assert uncovered_parts(t(1), t(2), []) == [(t(1), t(2))]


def test_the_sweep_plot_marks_a_value_with_no_reviewed_item_as_unknown():
    from cardiosieve.pipeline.plots import svg_sweep

    sweep = pd.DataFrame({"screen": "long_qt", "key": "qtc_high_risk", "value": [480.0, 500.0], "unit": "ms",
                          "findings": [3, 2], "items": [3, 2], "items_per_day": [1.0, 0.5], "reviewed_flagged": [2, 0],
                          "ppv": [0.5, float("nan")], "ppv_low": [0.09, float("nan")], "ppv_high": [0.91, float("nan")]})
    svg = svg_sweep(sweep)
    assert "PPV unknown (none reviewed)" in svg and "95 % Wilson interval" in svg and 'href="http' not in svg
