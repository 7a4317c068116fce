"""End to end over the committed sample lake: the planted ground truth against what a run finds,
rejects, reconciles, ranks and prints.

`sample_lake/_planted.csv` is the ground truth (pipeline/samplegen.py writes it with the lake):
`record = case` rows name a planted ECG, the screen expected to flag it (`kind`), whether a
finding is expected and which territories; `record = bad_row` rows name a row the loader must
reject and the reason code (pipeline/contract.py). Patients not in it are normal.

Runs, each once per session (module fixtures): the 30-day backfill through `run_interval`, the
last night twice through the CLI (fresh OUT, then a rerun), `cardiosieve show` and
`cardiosieve validate` over the whole lake. About 20 s in all.
"""
from __future__ import annotations

import contextlib
import io
import json
import re
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pyarrow.parquet as pq
import pytest

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.config import load_settings
from cardiosieve.pipeline.run import interval, run_interval, stage_dir

ROOT = Path(__file__).resolve().parents[1]
LAKE = ROOT / "sample_lake"
CONFIG = LAKE / "site.toml"
EXPECTED_LAST_NIGHT = Path(__file__).parent / "data" / "expected_last_night.csv"
EXPECTED_COLUMNS = ["rank", "item_id", "screen", "tier", "ecg_id"]

# The lake's period and its last night (sample_lake/README.md).
BACKFILL = ("2026-10-31T00:00:00Z", "2026-11-30T00:00:00Z")
LAST_NIGHT = ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")

# The worklist contract columns (pipeline/worklist.py).
WORKLIST_COLUMNS = ["item_id", "rank", "tier", "screen", "patient_id", "ecg_id", "ecg_at", "score", "summary",
                    "evidence", "caveats", "territories", "rule_version", "run_id", "first_flagged_at", "status",
                    "last_updated_at"]


# ---------------------------------------------------------------------------------------------
# Runs (once per session) and the ground truth

def _cli(argv: list[str]) -> tuple[int, str]:
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(argv)
    return code, buf.getvalue()


def _run_args(out: Path, start: str, end: str) -> list[str]:
    return ["run", "--lake", str(LAKE), "--config", str(CONFIG), "--out", str(out), "--start", start, "--end", end]


@pytest.fixture(scope="module")
def planted() -> pd.DataFrame:
    return pd.read_csv(LAKE / "_planted.csv", dtype=str, keep_default_na=False)


@pytest.fixture(scope="module")
def cases(planted) -> pd.DataFrame:
    return planted[planted["record"] == "case"]


@pytest.fixture(scope="module")
def bad_rows(planted) -> pd.DataFrame:
    return planted[planted["record"] == "bad_row"]


@pytest.fixture(scope="module")
def lake_ecg() -> pd.DataFrame:
    """Every ECG row of the lake, read straight from the files (also the planted duplicate)."""
    files = sorted((LAKE / "ecg").glob("date=*/*.parquet"))
    return pd.concat([pq.read_table(f, columns=["ecg_id", "patient_id", "acquired_at"]).to_pandas() for f in files],
                     ignore_index=True)


@pytest.fixture(scope="module")
def backfill(tmp_path_factory) -> SimpleNamespace:
    out = tmp_path_factory.mktemp("backfill")
    summary = run_interval(str(LAKE), str(out), *BACKFILL, config=str(CONFIG))
    d = stage_dir(out, *interval(*BACKFILL))
    return SimpleNamespace(out=out, summary=summary, interval=BACKFILL,
                           findings=pd.read_parquet(d / "findings.parquet"),
                           rejects=pd.read_parquet(out / "rejects.parquet"),
                           aligned=pd.read_parquet(out / "aligned.parquet"),
                           worklist=pd.read_parquet(out / "worklist.parquet"))


@pytest.fixture(scope="module")
def last_night(tmp_path_factory) -> SimpleNamespace:
    """The last night on a fresh OUT through the CLI, its `show`, then the same night again."""
    out = tmp_path_factory.mktemp("last_night")
    code, printed = _cli(_run_args(out, *LAST_NIGHT))
    first = pq.read_table(out / "worklist.parquet")
    summary = json.loads((out / "run_summary.json").read_text())
    show_code, shown = _cli(["show", "--out", str(out)])
    rerun_code, _ = _cli(_run_args(out, *LAST_NIGHT))
    return SimpleNamespace(out=out, code=code, printed=printed, summary=summary, interval=LAST_NIGHT,
                           worklist_table=first, worklist=first.to_pandas(),
                           rerun_code=rerun_code, rerun_table=pq.read_table(out / "worklist.parquet"),
                           show_code=show_code, shown=shown,
                           rejects=pd.read_parquet(out / "rejects.parquet"),
                           aligned=pd.read_parquet(out / "aligned.parquet"))


@pytest.fixture(scope="module", params=["backfill", "last_night"])
def run(request) -> SimpleNamespace:
    return request.getfixturevalue(request.param)


def _signs(evidence: str) -> set[str]:
    return {name for name, on in json.loads(evidence).get("signs", {}).items() if on}


def _pattern(evidence: str) -> str:
    return json.loads(evidence)["values"]["pattern"]


# ---------------------------------------------------------------------------------------------
# 1. Screens against the planted cases (whole lake)

def test_every_planted_case_expected_to_be_found_is_found_by_its_screen_with_its_territories(backfill, cases):
    want = cases[(cases["expect_finding"] == "true") & (cases["kind"] != "normal")]
    assert len(want) == 244   # 80 + 80 + 89 planted rows (9 of them prior ECGs), less 5 LBBB-discordant controls
    got = want.merge(backfill.findings, left_on=["ecg_id", "kind"], right_on=["ecg_id", "screen"], how="left")
    missing = got[got["screen"].isna()]
    assert missing[["kind", "detail"]].values.tolist() == []
    with_terr = got[got["expect_territories"] != ""]
    assert len(with_terr) > 50
    short = [(r.detail, r.expect_territories, r.territories) for r in with_terr.itertuples()
             if not set(r.expect_territories.split(",")) <= set(r.territories.split(","))]
    assert short == []


def test_every_planted_case_is_found_at_its_intended_tier_or_more_urgent(backfill, cases):
    # The tier each planted pattern must reach (pipeline/samplegen.py, from the tier policy of
    # docs/prioritisation.md): a STEMI pattern or an equivalent never sits below tier 2, K >= 6.0
    # with ECG signs and a QTc above 500 ms are tier 1, a severe haemolysed potassium tier 2.
    want = cases[cases["expect_tier_at_most"] != ""].assign(at_most=lambda d: d["expect_tier_at_most"].astype(int))
    assert len(want) > 200
    got = want.merge(backfill.findings, left_on=["ecg_id", "kind"], right_on=["ecg_id", "screen"], how="left")
    late = got[got["tier"].isna() | (got["tier"] > got["at_most"])]
    assert late[["detail", "at_most", "tier"]].values.tolist() == []
    st = got[got["kind"] == "st_deviation"]
    st_elev = st[st["evidence"].map(_pattern) == "st_elevation"]
    assert len(st_elev) > 30 and st_elev["tier"].max() <= 2


def test_criterion_tables_let_an_analyst_filter_by_any_criterion(backfill, cases):
    # OUT/criteria_<screen>.parquet: one row per aligned ECG and screen, typed criterion columns.
    tables = {s: pd.read_parquet(backfill.out / f"criteria_{s}.parquet") for s in ("hyperkalemia", "long_qt", "st_deviation")}
    for table in tables.values():
        assert sorted(table["ecg_id"]) == sorted(backfill.aligned["ecg_id"])
    st = tables["st_deviation"]
    # Filtering on one criterion column finds the planted pattern, and the tiers agree with the findings.
    peri = set(st.loc[st["pericarditis_like"], "ecg_id"])
    planted_peri = set(cases.loc[cases["detail"].str.startswith("pericarditis-like"), "ecg_id"])
    assert planted_peri and planted_peri <= peri
    posterior = set(st.loc[st["pattern"] == "posterior_depression", "ecg_id"])
    assert set(cases.loc[cases["detail"].str.startswith("posterior: ST depression V1-V3 without"), "ecg_id"]) <= posterior
    found = backfill.findings[backfill.findings["screen"] == "st_deviation"].set_index("ecg_id")["tier"]
    assert st.set_index("ecg_id").loc[found.index, "tier"].tolist() == found.tolist()
    hk = tables["hyperkalemia"]
    assert set(hk.loc[hk["k_severe"] & hk["k_hemolyzed"], "ecg_id"]) >= set(
        cases.loc[cases["detail"].str.startswith("haemolysed specimen, K 6.6"), "ecg_id"])


def test_planted_cases_expected_silent_get_no_finding_of_their_screen(backfill, cases):
    silent = cases[cases["expect_finding"] == "false"]
    assert set(silent["kind"]) == {"st_deviation", "normal"}    # LBBB-discordant controls and near misses
    lbbb = silent[silent["kind"] != "normal"].merge(backfill.findings, left_on=["ecg_id", "kind"],
                                                    right_on=["ecg_id", "screen"])
    assert lbbb["ecg_id"].tolist() == []
    # A near-miss control ("normal") is just below some screen's limit: no screen may flag it.
    near = silent[silent["kind"] == "normal"].merge(backfill.findings, on="ecg_id")
    assert near[["detail", "screen", "tier"]].values.tolist() == []


def test_unplanted_patients_get_no_finding(backfill, planted):
    # Normal patients meet no published criterion. 3 % of their ECGs are AF-like (no P wave, PR
    # empty): an absent P without a PR interval alone raises no finding when no potassium was
    # measured (screens/hyperkalemia.py, local choice).
    normal = backfill.findings[~backfill.findings["patient_id"].isin(set(planted["patient_id"]))]
    assert normal[["screen", "tier"]].values.tolist() == []
    af_like = backfill.aligned[backfill.aligned["pr_ms"].isna() & ~backfill.aligned["patient_id"].isin(set(planted["patient_id"]))]
    assert len(af_like) > 10                      # the case is really exercised


def test_planted_hyperkalemia_with_a_normal_ecg_shows_no_ecg_sign(backfill, cases):
    # "with a normal ECG" / "normal ECG" plants: the potassium alone decides; a sign here would
    # come from unrealistic ECG-to-ECG variation (T, PR, QRS against the prior ECG).
    normal_ecg = cases[(cases["kind"] == "hyperkalemia") & cases["detail"].str.contains("normal ECG")]
    got = normal_ecg.merge(backfill.findings[backfill.findings["screen"] == "hyperkalemia"], on="ecg_id")
    assert len(got) == len(normal_ecg) > 20
    assert [(r.detail, sorted(_signs(r.evidence))) for r in got.itertuples() if _signs(r.evidence)] == []


@pytest.mark.parametrize("detail, pattern", [
    ("avr pattern", "avr_widespread_depression"),
    ("pericarditis-like", "st_elevation"),     # a caveat on the elevation, never its own pattern
    ("wrap-around anterior", "st_elevation"),
    ("posterior: ST depression V1-V3 without", "posterior_depression"),
    ("ST depression V3-V6", "st_depression"),
    ("lbbb with excessively discordant", "lbbb_or_paced"),
    ("lbbb with concordant", "lbbb_or_paced"),
    ("anterior V1-V4", "st_elevation"),
    ("inferior with reciprocal", "st_elevation"),
])
def test_planted_st_patterns_are_reported_as_that_pattern(backfill, cases, detail, pattern):
    # An aVR elevation with depression in >= 6 other leads is that pattern, not "posterior"
    # (the V1-V3 depression is part of the widespread depression), see screens/st_deviation.py.
    planted_rows = cases[(cases["kind"] == "st_deviation") & cases["detail"].str.startswith(detail)]
    got = planted_rows.merge(backfill.findings[backfill.findings["screen"] == "st_deviation"], on="ecg_id")
    assert len(got) == len(planted_rows) > 0
    assert got["evidence"].map(_pattern).tolist() == [pattern] * len(got)


def test_a_normal_patients_ecgs_vary_modestly_from_one_to_the_next(planted):
    # Day-to-day variation of one heart: PR within 20 ms, QRS within 10 ms, T within ~22 %
    # (pipeline/samplegen.py); less than the screens' changes against the prior ECG
    # (T +50 %, PR +40 ms, QRS +20 ms; screens/rules.toml, LOCAL).
    ecg = pd.read_parquet(LAKE / "ecg", columns=["ecg_id", "patient_id", "acquired_at", "pr_ms", "qrs_ms"])
    ecg = ecg[~ecg["patient_id"].isin(set(planted["patient_id"]))].drop_duplicates("ecg_id", keep=False)
    ecg = ecg.sort_values(["patient_id", "acquired_at"])
    same = ecg["patient_id"].eq(ecg["patient_id"].shift())
    assert same.sum() > 500
    assert ecg["pr_ms"].diff()[same].abs().max() <= 20
    assert ecg["qrs_ms"].diff()[same].abs().max() <= 10
    leads = pd.read_parquet(LAKE / "ecg_lead", columns=["ecg_id", "lead", "t_amp_uv"])
    t = leads.pivot_table(index="ecg_id", columns="lead", values="t_amp_uv").reindex(ecg["ecg_id"])
    t_prev = t.shift()
    ratio = (t / t_prev)[same.to_numpy()][t_prev[same.to_numpy()] >= 100]
    assert ratio.max().max() < 1.25


# ---------------------------------------------------------------------------------------------
# 2. Rejects

def test_whole_lake_validate_rejects_every_planted_bad_row_with_its_reason(tmp_path, bad_rows):
    code, printed = _cli(["validate", "--lake", str(LAKE), "--config", str(CONFIG), "--out", str(tmp_path)])
    assert code == 2 and "rejected rows by reason" in printed   # rejects: exit 2
    rejects = pd.read_parquet(tmp_path / "validation_rejects.parquet")
    got = {(r.table, r.row_key, r.reason, r.column, Path(r.file).relative_to(LAKE).as_posix())
           for r in rejects.itertuples()}
    want = {(r.table, r.row_key, r.reason, r.column, r.file) for r in bad_rows.itertuples()}
    assert len(want) == 10                       # 8 plants, 10 rows (sample_lake/README.md)
    assert want <= got
    # Nothing else is rejected but the first copy of the duplicated ECG (all copies go).
    extra = {g for g in got if g[:3] not in {w[:3] for w in want}}
    assert extra == set()


def _in_scope(bad: pd.DataFrame, lake_ecg: pd.DataFrame, lo_hi: tuple[str, str]) -> pd.DataFrame:
    """The planted bad rows a run of [lo, hi) reads: ECG rows acquired in it; lead rows of those
    ECGs; lab rows of the analytes the site config names, for patients with an ECG in it, on a
    day that meets the lab window (pipeline/run.py stage_load). Other rows are never read."""
    lo, hi = interval(*lo_hi)
    settings = load_settings(str(CONFIG))
    w = settings.windows
    night = lake_ecg[(lake_ecg["acquired_at"] >= lo) & (lake_ecg["acquired_at"] < hi)]
    day = pd.to_datetime(bad["date"]).dt.tz_localize("UTC")
    lab = bad[bad["table"] == "lab"]
    lab_meta = pd.concat([pq.read_table(LAKE / f, columns=["result_id", "analyte"]).to_pandas()
                          for f in lab["file"].unique()])
    analyte = bad["row_key"].map(lab_meta.set_index("result_id")["analyte"])
    lab_lo = lo - pd.Timedelta(hours=w["lab_before_h"] + w["k_trend_h"])
    lab_hi = hi + pd.Timedelta(hours=w["lab_after_h"])
    keep = (
        ((bad["table"] == "ecg") & (day >= lo.normalize()) & (day < hi))
        | ((bad["table"] == "ecg_lead") & bad["ecg_id"].isin(set(night["ecg_id"])))
        | ((bad["table"] == "lab") & analyte.isin(set(settings.analyte_of_code()))
           & bad["patient_id"].isin(set(night["patient_id"]))
           & (day + pd.Timedelta(days=1) > lab_lo) & (day < lab_hi))
    )
    return bad[keep]


def test_a_run_rejects_exactly_the_planted_bad_rows_it_reads_with_their_reasons(run, bad_rows, lake_ecg):
    want = _in_scope(bad_rows, lake_ecg, run.interval)
    # Backfill: both QRS plants, the duplicate, V10, K 45, K in mg/L and the one potassium of the
    # three naive rows (the sodium and creatinine ones, and the text glucose, are not analytes
    # the run reads). Last night: the same less the two mid-period plants.
    assert len(want) == {"backfill": 7, "last_night": 5}["backfill" if run.interval == BACKFILL else "last_night"]
    got = {(r.table, r.row_key, r.reason) for r in run.rejects.itertuples()}
    assert got == {(r.table, r.row_key, r.reason) for r in want.itertuples()}


# ---------------------------------------------------------------------------------------------
# 3. Reconciliation

def test_every_table_reconciles_rows_in_with_accepted_plus_rejected(run):
    tables = run.summary["tables"]
    assert {"ecg", "ecg_history", "lab", "patient", "medication", "ecg_lead"} <= set(tables)
    assert {n: t["rows_in"] for n, t in tables.items()} == \
           {n: t["accepted"] + t["rejected"] for n, t in tables.items()}
    quality = run.summary["quality"]["rejected"]
    assert len(run.rejects) == sum(t["rejected"] for t in tables.values()) + quality


def test_ecgs_screened_plus_rejected_equal_the_ecgs_in_the_interval(run, lake_ecg):
    lo, hi = interval(*run.interval)
    in_lake = int(((lake_ecg["acquired_at"] >= lo) & (lake_ecg["acquired_at"] < hi)).sum())
    ecg = run.summary["tables"]["ecg"]
    rejected = int(((run.rejects["table"] == "ecg") & (run.rejects["scope"] == "night")).sum())
    assert ecg["rows_in"] == in_lake
    assert ecg["screened"] == len(run.aligned) == run.aligned["ecg_id"].nunique()
    assert ecg["screened"] + rejected == in_lake


# ---------------------------------------------------------------------------------------------
# 4. The worklist

def test_worklist_has_the_contract_columns_and_ranks_one_to_n(run):
    w = run.worklist
    assert set(WORKLIST_COLUMNS) <= set(w.columns)
    assert len(w) > 0
    assert sorted(w["rank"].tolist()) == list(range(1, len(w) + 1))
    assert w["item_id"].is_unique


def test_rerunning_the_same_night_leaves_the_worklist_identical(last_night):
    assert last_night.code == 0 and last_night.rerun_code == 0
    assert last_night.rerun_table.equals(last_night.worklist_table, check_metadata=True)


def _expected_frame(worklist: pd.DataFrame) -> pd.DataFrame:
    out = worklist.sort_values("rank")[EXPECTED_COLUMNS].reset_index(drop=True)
    return out.astype({"rank": "int64", "tier": "int64", "item_id": str, "screen": str, "ecg_id": str})


def test_last_night_worklist_equals_the_reviewed_expected_list(last_night, cases):
    """The last night's worklist on a fresh OUT, item by item, against tests/data/expected_last_night.csv.

    That file was written from the code and then checked by hand against sample_lake/_planted.csv:
    its 38 items are the 39 planted cases of 2026-11-29 with expect_finding = true, each under its
    planted screen and at its expect_tier_at_most or more urgent (the two ECGs of the persistent
    inferior elevation, hours apart, fold into one item); none of the 8 near-miss or
    LBBB-discordant controls of that night.
    A change of that file changes what a clinician sees first: it needs clinical review, with the
    reason in the commit message. Regenerate it (after a deliberate change of rules, ranking or
    the sample lake) with

        .venv/bin/python -m tests.test_end_to_end

    and read the diff against _planted.csv before committing.
    """
    expected = pd.read_csv(EXPECTED_LAST_NIGHT, dtype={"item_id": str, "screen": str, "ecg_id": str})
    pd.testing.assert_frame_equal(_expected_frame(last_night.worklist), expected[EXPECTED_COLUMNS])
    # The reviewed file itself still matches the ground truth.
    night = cases[(cases["date"] == "2026-11-29") & (cases["expect_finding"] == "true")]
    listed = set(zip(expected["ecg_id"], expected["screen"]))
    assert listed <= set(zip(night["ecg_id"], night["kind"]))
    # A planted ECG not listed is folded into the item of the same patient and screen (one episode).
    patient_of = dict(zip(night["ecg_id"], night["patient_id"]))
    folded = night[~night["ecg_id"].isin(expected["ecg_id"])]
    assert len(folded) == 1
    assert set(zip(folded["patient_id"], folded["kind"])) <= {(patient_of[e], s) for e, s in listed}


# ---------------------------------------------------------------------------------------------
# 5. What the CLI prints

@pytest.fixture(scope="module")
def lake_ids() -> set[str]:
    ecg = pd.read_parquet(LAKE / "ecg", columns=["ecg_id", "patient_id"])
    patient = pd.read_parquet(LAKE / "patient", columns=["patient_id"])
    return set(ecg["ecg_id"]) | set(ecg["patient_id"]) | set(patient["patient_id"])


def test_run_prints_counts_by_reason_screen_and_tier(last_night):
    out, s = last_night.printed, last_night.summary
    e = s["tables"]["ecg"]
    assert f"ECGs in interval: {e['rows_in']}  screened: {e['screened']}  rejected: {e['rows_in'] - e['screened']}" in out
    assert "rejected rows by reason:" in out
    for key, n in s["rejects_by_reason"].items():
        assert re.search(rf"^\s+{re.escape(key)}\s+{n}$", out, flags=re.M), key
    assert "findings by screen and tier:" in out
    for screen, tiers in s["findings"].items():
        line = next(x for x in out.splitlines() if x.strip().startswith(screen + " "))
        assert all(f"tier {t}: {n}" in line for t, n in tiers.items())
    assert "worklist items by screen: " + ", ".join(
        f"{k} {v}" for k, v in sorted(s["worklist"]["by_screen"].items())) in out


def test_run_output_carries_no_patient_or_ecg_identifier(last_night, lake_ids):
    assert len(lake_ids) > 5000
    out = last_night.printed
    assert [i for i in lake_ids if i in out] == []
    assert "FGI-" not in out      # the sample site's id prefix, whatever the id


def test_show_prints_the_caution_and_the_patients_to_review(last_night):
    assert last_night.show_code == 0
    lines = last_night.shown.splitlines()
    assert lines[0] == CAUTION
    top = last_night.worklist.sort_values("rank").head(20)
    assert all(pid in last_night.shown for pid in top["patient_id"])


def test_a_backfill_writes_the_worklist_from_its_last_chunk_with_every_chunks_items(tmp_path):
    # Three chunks of one night on a fresh store, no reviews: every item is active or was changed
    # by one of the run's chunks, so the published worklist is the store's whole table, ranked.
    # The earlier chunks skip the file (stage_finish publishes the last chunk's).
    from cardiosieve.pipeline.store import open_store, read_items, sqlite_url

    out = tmp_path / "out"
    bounds = ("2026-11-27T00:00:00Z", "2026-11-30T00:00:00Z")
    summary = run_interval(str(LAKE), str(out), *bounds, config=str(CONFIG), quality=False, chunk_days=1)
    assert summary["chunks"] == 3
    worklist = pd.read_parquet(out / "worklist.parquet")
    engine = open_store(sqlite_url(out), create=False)
    stored = read_items(engine)
    engine.dispose()
    assert len(stored) > 0 and stored["run_id"].nunique() > 1   # items of more than one chunk
    pd.testing.assert_frame_equal(worklist, stored)
    assert worklist["rank"].tolist() == list(range(1, len(worklist) + 1))
    lo, hi = interval(*bounds)
    days = pd.date_range(lo, hi, freq="D")
    assert [(stage_dir(out, a, b) / "worklist.parquet").exists() for a, b in zip(days[:-1], days[1:])] == [
        False, False, True]
    active = stored[stored["status"].isin(["open", "reopened"])]
    assert summary["worklist"]["by_screen"] == active.groupby("screen").size().to_dict()


# ---------------------------------------------------------------------------------------------
# 6. The screening-only caution

def test_the_caution_travels_with_the_summary_and_the_worklist_file(last_night):
    assert last_night.printed.rstrip().splitlines()[-1].strip() == CAUTION
    assert pd.read_parquet(last_night.out / "worklist.parquet").attrs.get("caution") == CAUTION
    assert "Screening aid for human review, not a diagnosis" in CAUTION


# ---------------------------------------------------------------------------------------------
def _regenerate_expected(path: Path = EXPECTED_LAST_NIGHT) -> None:
    """Write tests/data/expected_last_night.csv from the current code (see the test's docstring)."""
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        code, _ = _cli(_run_args(Path(tmp), *LAST_NIGHT))
        assert code == 0
        frame = _expected_frame(pd.read_parquet(Path(tmp) / "worklist.parquet"))
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(path, index=False)
    print(f"wrote {path} ({len(frame)} items): review it against sample_lake/_planted.csv")


if __name__ == "__main__":
    _regenerate_expected()
