"""The worklist sub-commands: review, yield, export, show (registered on a bare argparse parser,
as the CLI does)."""
import argparse
import json
import subprocess
import sys

import pandas as pd
import pytest

from cardiosieve.pipeline import commands
from cardiosieve.pipeline.cli import EXIT_PARTIAL
from cardiosieve.pipeline.store import OUTCOMES, open_store, read_items, read_worklist, sqlite_url, upsert_items
from cardiosieve.pipeline.files import write_parquet_atomic
from cardiosieve.pipeline.worklist import build_items
from cardiosieve.screens import FINDING_COLUMNS

NIGHT = pd.Timestamp("2026-03-02 02:00", tz="UTC")


def parser():
    p = argparse.ArgumentParser(prog="cardiosieve")
    commands.register(p.add_subparsers(dest="command", required=True))
    return p


def run(capsys, *argv):
    args = parser().parse_args([str(a) for a in argv])
    code = args.handler(args)
    out, err = capsys.readouterr()
    return code, out, err


def finding(ecg_id, patient_id, tier=2, severity=0.5, summary=None):
    return {"ecg_id": ecg_id, "patient_id": patient_id, "acquired_at": pd.Timestamp("2026-03-01 20:00", tz="UTC"),
            "screen": "hyperkalemia", "tier": tier,
            "score_parts": json.dumps({"severity": severity, "lab_confirmed": 1, "lab_gap_min": 30}),
            "summary": summary or f"potassium high on {ecg_id}", "evidence": "{}", "caveats": "[]",
            "territories": "", "rule_version": "hyperkalemia/1.0.0"}


@pytest.fixture
def out(tmp_path):
    """An OUT folder with a worklist in OUT/worklist.sqlite and OUT/worklist.parquet."""
    f = pd.DataFrame([finding("e1", "pat-A", tier=1), finding("e2", "pat-B"), finding("e3", "pat-C", severity=0.9)],
                     columns=FINDING_COLUMNS)
    items = build_items(f, None, None, "run-1", NIGHT)
    engine = open_store(sqlite_url(tmp_path))
    upsert_items(engine, items)
    write_parquet_atomic(read_worklist(engine, ["run-1"]), tmp_path / "worklist.parquet")   # as the run does
    engine.dispose()
    return tmp_path


def test_module_imports_only_the_standard_library_at_start_up():
    code = ("import sys, cardiosieve.pipeline.commands; "
            "print(sorted(m for m in ('pandas', 'numpy', 'sqlalchemy', 'scipy', 'pyarrow') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"


def test_outcome_help_lists_exactly_the_stored_outcomes():
    assert commands.OUTCOME_HELP.split(", ") == list(OUTCOMES)


def test_show_help_lists_exactly_the_screens_statuses_and_tiers():
    from cardiosieve.pipeline.worklist import STATUSES
    from cardiosieve.screens import SCREENS
    from cardiosieve.screens._frame import TIER_LEAST_URGENT, TIER_MOST_URGENT

    assert commands.SCREEN_HELP.split(", ") == list(SCREENS)
    assert commands.STATUS_HELP.split(", ") == list(STATUSES)
    assert commands.TIERS == tuple(range(TIER_MOST_URGENT, TIER_LEAST_URGENT + 1))


def test_register_adds_the_five_sub_commands():
    for name in ("review", "yield", "export", "show"):
        assert callable(parser().parse_args([name, "--db", "sqlite://"]).handler)
    assert callable(parser().parse_args(["serve", "--out", "OUT"]).handler)


def test_show_prints_the_caution_and_the_ranked_head(out, capsys):
    code, text, _ = run(capsys, "show", "--out", out, "--limit", "2")
    lines = text.splitlines()
    headers = [line.split() for line in lines if line.startswith("#")]
    assert code == 0
    assert lines[0] == commands.CAUTION
    assert headers[0][:6] == ["#1", "tier", "1", "hyperkalemia", "open", "score"]   # tier 1 first
    assert headers[1][:3] == ["#2", "tier", "2"]                                       # then the higher score
    assert "pat-A" in text and "pat-C" in text and "pat-B" not in text
    assert lines[-1].startswith("2 of 3 matching items shown (3 stored); times in UTC")


def test_show_with_out_and_with_db_give_the_same_rows(out, capsys):
    _, from_out, _ = run(capsys, "show", "--out", out)
    _, from_db, _ = run(capsys, "show", "--db", sqlite_url(out))
    assert from_out == from_db


def test_show_without_a_worklist_says_so(tmp_path, capsys):
    code, _, err = run(capsys, "show", "--out", tmp_path)
    assert code == 2 and "no worklist" in err


@pytest.mark.parametrize("where", ["--out", "--db"])
def test_review_closes_the_item_and_show_hides_it(out, capsys, where):
    # show reads the store, where reviews land, not OUT/worklist.parquet (the night's copy, which
    # still says open until the next run).
    store_at = out if where == "--out" else sqlite_url(out)
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    code, text, _ = run(capsys, "review", top, "--outcome", "finding_real", "--role", "registrar",
                        "--at", "2026-03-02T09:00:00Z", "--out", out)
    assert code == 0 and "item closed" in text and "pat-" not in text
    _, shown, _ = run(capsys, "show", where, store_at)
    assert "pat-A" not in shown and shown.splitlines()[-1].startswith("2 of 2 matching items shown (3 stored")
    _, shown_all, _ = run(capsys, "show", where, store_at, "--include-closed")
    assert "pat-A" in shown_all and "closed" in shown_all


def test_show_with_out_needs_no_worklist_parquet(out, capsys):
    (out / "worklist.parquet").unlink()
    code, text, _ = run(capsys, "show", "--out", out)
    assert code == 0 and text.splitlines()[-1].startswith("3 of 3 matching items shown")


def test_review_help_names_only_the_new_outcomes(capsys):
    with pytest.raises(SystemExit):
        parser().parse_args(["review", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "finding_real, finding_not_real, already_known, data_problem" in text
    assert "confirmed" not in text


def test_review_takes_the_old_word_confirmed_as_finding_real(out, capsys):
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    code, text, _ = run(capsys, "review", top, "--outcome", "confirmed", "--role", "registrar",
                        "--at", "2026-03-02T09:00:00Z", "--out", out)
    assert code == 0 and "item closed" in text
    closed = read_items(open_store(sqlite_url(out))).set_index("item_id").loc[top]
    assert closed["status_reason"] == "reviewed: finding_real"


def test_review_with_unknown_outcome_fails_with_exit_2(out, capsys):
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    code, _, err = run(capsys, "review", top, "--outcome", "perhaps", "--role", "registrar", "--out", out)
    assert code == 2 and "unknown_outcome" in err


def test_review_import_reports_rejects_by_line_and_exits_3(out, capsys, tmp_path):
    # 3 (EXIT_PARTIAL): some lines rejected, the rest imported; 1 would read as an internal error.
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    csv = tmp_path / "staff.csv"
    csv.write_text(f"item_id,reviewed_at,reviewer_role,outcome\n{top},2026-03-02T09:00:00Z,nurse,finding_real\n"
                   f"{top},2026-03-02T10:00:00Z,nurse,maybe\n")
    code, text, _ = run(capsys, "review", "--import-csv", csv, "--out", out)
    assert code == EXIT_PARTIAL == 3
    assert "imported 1" in text and "rejected 1" in text
    assert "rejected line 3: outcome: unknown_outcome" in text


def test_review_import_without_rejects_exits_0(out, capsys, tmp_path):
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    csv = tmp_path / "staff.csv"
    csv.write_text(f"item_id,reviewed_at,reviewer_role,outcome\n{top},2026-03-02T09:00:00Z,nurse,finding_real\n")
    code, text, _ = run(capsys, "review", "--import-csv", csv, "--out", out)
    assert code == 0 and "imported 1" in text and "rejected 0" in text


def test_yield_prints_a_table_per_screen_and_tier(out, capsys):
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    run(capsys, "review", top, "--outcome", "finding_real", "--role", "registrar", "--at", "2026-03-02T04:00:00Z",
        "--out", out)
    code, text, _ = run(capsys, "yield", "--out", out)
    rows = [line.split() for line in text.splitlines()]
    assert code == 0 and rows[0] == ["screen", "tier", "items", "reviewed", "finding_real", "already_known", "ppv",
                                     "ppv_95ci", "median_h_to_review", "missed_of_screen"]
    assert "confirmed" not in text
    # tier 1: 1 item, reviewed as a real finding 2 h after the flag; Wilson 1/1 = 0.21 to 1.00
    # (z^2/(1+z^2) = 0.2065, by hand).
    assert rows[1] == ["hyperkalemia", "1", "1", "1", "1", "0", "1.00", "0.21-1.00", "2.0", "0"]
    assert rows[2][:4] == ["hyperkalemia", "2", "2", "0"] and rows[2][6] == "-"
    assert "pat-" not in text


def test_export_writes_csv_to_standard_output(out, capsys):
    code, text, _ = run(capsys, "export", "--out", out, "--format", "csv")
    assert code == 0
    assert text.splitlines()[0].startswith("item_id,rank,tier,screen,patient_id")
    assert len(text.splitlines()) == 4


def test_store_commands_need_db_or_out(capsys):
    code, _, err = run(capsys, "yield")
    assert code == 2 and "--db" in err


@pytest.mark.parametrize("extra, reason", [
    (["--role", "r" * 129], "text_too_long"),        # the role column holds 128 characters
    (["--role", "registrar", "--note", "n" * 2001], "text_too_long"),   # notes up to 2000 characters
    (["--role", "registrar", "--note", "bad\x00note"], "invalid_text"),
])
def test_a_review_with_text_over_its_documented_length_or_a_nul_byte_exits_2(out, capsys, extra, reason):
    top = read_items(open_store(sqlite_url(out))).iloc[0]["item_id"]
    code, _, err = run(capsys, "review", top, "--outcome", "finding_real", *extra, "--at", "2026-03-02T04:00:00Z",
                       "--out", out)
    assert code == 2 and reason in err
    assert read_items(open_store(sqlite_url(out))).set_index("item_id").loc[top, "status"] != "closed"
