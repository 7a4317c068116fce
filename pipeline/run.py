"""The nightly job, in stages that the CLI runs in a row and the Airflow DAG runs as tasks.

Each stage reads what the previous one wrote under OUT/_stage/<start>_<end>/ and returns a small
dict of counts and paths (never rows): it is what lands in scheduler logs and XCom. Every file is
written to a temporary name and renamed, and the last stage publishes the run's outputs together
(pipeline/publish.py): a crash at any point leaves the previous published state or the new one,
never a mix, and a rerun of the same interval rewrites the same files.
"""
from __future__ import annotations

import logging
import os
import time
from datetime import datetime
from pathlib import Path

import pandas as pd

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.archive import archive_chunk
from cardiosieve.pipeline.config import Settings, load_settings
from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.faults import fault_point
from cardiosieve.pipeline.files import private_dir, write_json_atomic, write_parquet_atomic
from cardiosieve.pipeline.frames import isin
from cardiosieve.pipeline.publish import STAGE_DIR

# Progress: interval bounds, counts and seconds only, never a row (the CLI shows INFO on stderr:
# a line per chunk with the time left; --verbose adds a line per stage).
log = logging.getLogger(__name__)

# What the prior-ECG lookup needs of the patients' earlier ECGs (pipeline/align.py PRIOR_COLUMNS).
CHECKED_TABLES = ("ecg", "ecg_lead", "lab", "patient", "medication")   # what the quality gate sees
HISTORY_COLUMNS = ["ecg_id", "patient_id", "acquired_at", "heart_rate_bpm", "rr_ms", "pr_ms", "qrs_ms", "qt_ms"]


# Run bounds cardiosieve accepts: ECG carts with digital exports, and far enough ahead for any
# scheduler's logical dates. Partition names and the stage folders' names need four-digit years.
FIRST_INSTANT = pd.Timestamp("1980-01-01", tz="UTC")
LAST_INSTANT = pd.Timestamp("2199-12-31", tz="UTC")


class RunError(BadInputError):
    """The run cannot go on with this input or configuration (exit code 2)."""


def parse_instant(value: str | datetime | pd.Timestamp, name: str) -> pd.Timestamp:
    """A run bound as a UTC timestamp; a bound without offset (e.g. 2026-11-29) is read as UTC."""
    try:
        ts = pd.Timestamp(value)
    except (ValueError, TypeError):
        raise RunError(f"--{name} {value!r} is not an ISO 8601 date or timestamp") from None
    if ts is pd.NaT:
        raise RunError(f"--{name} is empty")
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    if not FIRST_INSTANT <= ts <= LAST_INSTANT:
        raise RunError(f"--{name} {value!r} is outside the supported range "
                       f"{FIRST_INSTANT:%Y-%m-%d} to {LAST_INSTANT:%Y-%m-%d}")
    return ts.as_unit("us")


def interval(start, end) -> tuple[pd.Timestamp, pd.Timestamp]:
    lo, hi = parse_instant(start, "start"), parse_instant(end, "end")
    if not lo < hi:
        raise RunError("--start must be before --end")
    return lo, hi


def stage_dir(out: str | Path, lo: pd.Timestamp, hi: pd.Timestamp) -> Path:
    private_dir(Path(out) / STAGE_DIR)
    return private_dir(Path(out) / STAGE_DIR / f"{lo:%Y%m%dT%H%M%SZ}_{hi:%Y%m%dT%H%M%SZ}")


# ---------------------------------------------------------------------------------------------
# Stages

def stage_load(lake, out, start, end, config=None, settings: Settings | None = None) -> dict:
    """Read the night's ECGs and, for their patients only, what alignment needs; write them and
    the rejects. Returns counts per table (rows in = accepted + rejected)."""
    from cardiosieve.pipeline.load import read_table

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    w = settings.windows
    d = stage_dir(out, lo, hi)

    for stale in [*d.glob("*.checked.parquet"), *d.glob("rejects_*.parquet"), d / "prior_lead.parquet",
                  d / "quality.json", d / "quality.html"]:
        stale.unlink(missing_ok=True)                      # derived from an earlier load
    night = read_table(lake, c.ECG, settings, scope="night", window=(lo, hi))
    pids = night.clean["patient_id"].unique().tolist()
    keep = {"patient_id": pids}
    own = (lo, hi)        # context reads count misfiled rows of tonight's partitions only (load.py)
    history = read_table(lake, c.ECG, settings, scope="window", keep=keep, columns=HISTORY_COLUMNS,
                         window=(lo - pd.Timedelta(days=w["prior_ecg_max_days"]), lo), night=own)
    lab_codes = sorted(settings.analyte_of_code())
    lab = read_table(lake, c.LAB, settings, scope="window", keep={**keep, "analyte": lab_codes},
                     window=(lo - pd.Timedelta(hours=w["lab_before_h"] + w["k_trend_h"]),
                             hi + pd.Timedelta(hours=w["lab_after_h"])), night=own)
    patient = read_table(lake, c.PATIENT, settings, scope="window", keep=keep)
    medication = read_table(lake, c.MEDICATION, settings, scope="window", keep=keep,
                            window=(lo - pd.Timedelta(hours=w["medication_h"]), hi), night=own)
    night, history = _reject_cross_partition_ids(night, history)
    ecg_history = pd.concat([history.clean, night.clean], ignore_index=True)

    loaded = {"ecg": night, "ecg_history": history, "lab": lab, "patient": patient, "medication": medication}
    write_parquet_atomic(night.clean, d / "ecg.parquet")
    write_parquet_atomic(ecg_history, d / "ecg_history.parquet")
    write_parquet_atomic(lab.clean, d / "lab.parquet")
    if lab.placed is not None and len(lab.placed):
        write_parquet_atomic(lab.placed, d / "lab_rejected_placed.parquet")
    else:
        (d / "lab_rejected_placed.parquet").unlink(missing_ok=True)
    write_parquet_atomic(patient.clean, d / "patient.parquet")
    has_medication = (Path(lake) / "medication").is_dir()
    if has_medication:
        write_parquet_atomic(medication.clean, d / "medication.parquet")
    elif (d / "medication.parquet").exists():
        (d / "medication.parquet").unlink()
    # The night's leads now (the quality gate checks them); prior ECGs' leads after alignment.
    leads = read_table(lake, c.ECG_LEAD, settings, scope="night", keep={"ecg_id": night.clean["ecg_id"].tolist()},
                       days=_with_slack(set(night.clean["acquired_at"].dt.strftime("%Y-%m-%d").unique())))
    loaded["ecg_lead"] = leads
    write_parquet_atomic(leads.clean, d / "ecg_lead.parquet")
    rejects = pd.concat([night.rejects, history.rejects, lab.rejects, patient.rejects,
                         medication.rejects, leads.rejects], ignore_index=True)
    write_parquet_atomic(rejects, d / "rejects.parquet")
    counts = {name: {"rows_in": t.rows_in, "accepted": len(t.clean), "rejected": len(t.rejects),
                     "files": t.files} for name, t in loaded.items()}
    return {"interval": [lo.isoformat(), hi.isoformat()], "stage_dir": str(d), "tables": counts,
            "rejects_by_reason": _reasons(rejects)}


def _reject_cross_partition_ids(night, history):
    """An ECG id tonight that is also in an earlier partition is a duplicate_id (the contract's
    key is unique across the lake): every copy is rejected with its reason, so no ECG becomes its
    own prior and no row leaves uncounted."""
    from dataclasses import replace

    in_history = isin(night.clean["ecg_id"], history.clean["ecg_id"])      # hash sets, not Python sets
    if not in_history.any():
        return night, history
    dup = night.clean.loc[in_history, "ecg_id"]

    def split(loaded, scope):
        bad = isin(loaded.clean["ecg_id"], dup)
        rejects = pd.DataFrame({"table": c.ECG.name, "scope": scope, "row_key": loaded.clean.loc[bad, "ecg_id"],
                                "file": "", "column": "ecg_id", "reason": c.DUPLICATE_ID,
                                "detail": "same ecg_id in another date partition"}, columns=c.REJECT_COLUMNS)
        return replace(loaded, clean=loaded.clean[~bad].reset_index(drop=True),
                       rejects=pd.concat([loaded.rejects, rejects.astype("str")], ignore_index=True))

    return split(night, "night"), split(history, "window")


def _load_prior_leads(lake, d: Path, aligned: pd.DataFrame, settings: Settings) -> int:
    """Append the chosen prior ECGs' lead rows to the stage's ecg_lead.parquet (scope window)."""
    from cardiosieve.pipeline.load import read_table

    priors = aligned.dropna(subset=["prior_ecg_id"])
    priors = priors[~isin(priors["prior_ecg_id"], aligned["ecg_id"])].drop_duplicates("prior_ecg_id")
    if priors.empty:
        return 0
    days = _with_slack(set(priors["prior_acquired_at"].dt.strftime("%Y-%m-%d").unique()))
    got = read_table(lake, c.ECG_LEAD, settings, scope="window", keep={"ecg_id": priors["prior_ecg_id"].tolist()},
                     days=days)
    write_parquet_atomic(got.clean, d / "prior_lead.parquet")
    write_parquet_atomic(got.rejects, d / "rejects_prior_lead.parquet")
    return len(got.clean)


def read_stage(d: Path, name: str) -> pd.DataFrame | None:
    """A stage table: the quality gate's checked copy when there is one, else the loaded one;
    None for an optional table the lake lacks."""
    for path in (d / f"{name}.checked.parquet", d / f"{name}.parquet"):
        if path.exists():
            return pd.read_parquet(path)
    return None


def all_rejects(d: Path) -> pd.DataFrame:
    """Every reject of the interval: the loader's, the quality gate's and the prior leads'."""
    parts = [pd.read_parquet(p) for p in [d / "rejects.parquet", *sorted(d.glob("rejects_*.parquet"))] if p.exists()]
    return pd.concat(parts, ignore_index=True)


def _with_slack(days: set[str]) -> set[str]:
    """Lead partitions may follow the site's local date: also read the neighbouring days."""
    out = set(days)
    for day in days:
        t = pd.Timestamp(day)
        out.add((t - pd.Timedelta(days=1)).strftime("%Y-%m-%d"))
        out.add((t + pd.Timedelta(days=1)).strftime("%Y-%m-%d"))
    return out


def _reasons(rejects: pd.DataFrame) -> dict:
    if rejects.empty:
        return {}
    g = rejects.groupby(["table", "reason"]).size()
    return {f"{t}:{r}": int(n) for (t, r), n in g.items()}


def stage_align(out, start, end, config=None, settings: Settings | None = None, lake=None) -> dict:
    """Align the loaded night (pure pandas; see pipeline/align.py) and write aligned.parquet;
    with `lake`, also read the lead rows of the chosen prior ECGs (the screens compare with them)."""
    from cardiosieve.pipeline.align import align

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    ecg = read_stage(d, "ecg")
    history = read_stage(d, "ecg_history")
    loaded = pd.read_parquet(d / "ecg.parquet", columns=["ecg_id"])["ecg_id"]
    removed = loaded[~isin(loaded, ecg["ecg_id"])]
    if len(removed):                                       # night ECGs the quality gate removed are no baseline
        history = history[~isin(history["ecg_id"], removed)]
    aligned = align(ecg, history, read_stage(d, "lab"), read_stage(d, "patient"), read_stage(d, "medication"), settings,
                    lab_rejects=_gate_lab_rejects(d))
    write_parquet_atomic(aligned, d / "aligned.parquet")
    prior_leads = 0
    if lake is not None:
        prior_leads = _load_prior_leads(lake, d, aligned, settings)
    return {"aligned": len(aligned), "prior_lead_rows": prior_leads,
            "with_potassium": int(aligned["k_mmol_l"].notna().sum()),
            "with_prior_ecg": int(aligned["prior_ecg_id"].notna().sum())}


def _gate_lab_rejects(d: Path) -> pd.DataFrame | None:
    """Rejected lab rows placed by patient and time, so that the aligned table can say "a
    potassium was rejected" rather than "none measured": the loader's (whose patient, time and
    analyte could still be read) and the quality gate's (placed from the loaded lab table)."""
    parts = []
    if (d / "lab_rejected_placed.parquet").exists():
        parts.append(pd.read_parquet(d / "lab_rejected_placed.parquet"))
    path = d / "rejects_quality.parquet"
    if path.exists() and (d / "lab.parquet").exists():
        rejects = pd.read_parquet(path, columns=["table", "row_key", "reason"])
        rejects = rejects[rejects["table"] == "lab"]
        lab = pd.read_parquet(d / "lab.parquet", columns=["result_id", "patient_id", "collected_at", "analyte"])
        placed = lab.merge(rejects.rename(columns={"row_key": "result_id"})[["result_id", "reason"]], on="result_id")
        parts.append(placed.drop_duplicates("result_id"))
    parts = [p for p in parts if len(p)]
    return pd.concat(parts, ignore_index=True) if parts else None


def _rows_per_day(lake, table: c.Table, first: str, last: str) -> dict[str, int]:
    """Rows per date partition of `table` over the days [first, last], from the Parquet footers
    only (no data pages)."""
    import pyarrow.parquet as pq
    from cardiosieve.pipeline.load import file_day, table_files

    days: dict[str, int] = {}
    for f in table_files(lake, table, first, last):
        day = file_day(lake, table, f)
        if day is not None:
            days[day] = days.get(day, 0) + pq.ParquetFile(f).metadata.num_rows
    return days


def _previous_nights(lo: pd.Timestamp, nights: int) -> tuple[str, str]:
    return (lo - pd.Timedelta(days=nights)).strftime("%Y-%m-%d"), (lo - pd.Timedelta(days=1)).strftime("%Y-%m-%d")


def lab_volume(lake, lo: pd.Timestamp, hi: pd.Timestamp, nights: int = 28) -> tuple[list[float], float]:
    """Lab rows per night in the lab partitions (whole partitions, every patient: a like-for-like
    count of the feed itself) over the nights before `lo`, scaled to the run's length, and the
    partitions of [lo, hi)."""
    scale = (hi - lo) / pd.Timedelta(days=1)
    before = _rows_per_day(lake, c.LAB, *_previous_nights(lo, nights))
    tonight = _rows_per_day(lake, c.LAB, lo.strftime("%Y-%m-%d"), (hi - pd.Timedelta(microseconds=1)).strftime("%Y-%m-%d"))
    return [before[d] * scale for d in sorted(before)], float(sum(tonight.values()))


def trailing_counts(lake, lo: pd.Timestamp, hi: pd.Timestamp, nights: int = 28) -> dict:
    """ECG rows per night over the nights before `lo`, from the partitions' footers, scaled to
    the run's length in days: the quality gate's row-count band. (Only the ECG table: tonight's
    lab rows are read for the night's patients alone, so the lab feed is judged by its whole
    partitions instead, `lab_volume`.)"""
    scale = (hi - lo) / pd.Timedelta(days=1)
    per_day = _rows_per_day(lake, c.ECG, *_previous_nights(lo, nights))
    return {c.ECG.name: [per_day[d] * scale for d in sorted(per_day)]} if per_day else {}


def stage_quality(lake, out, start, end, config=None, settings: Settings | None = None) -> dict:
    """The data-quality gate over the loaded night (pipeline/quality.py), in this process: the
    row checks and Great Expectations' verdict together (the Airflow task; `run_interval` splits
    them, see pipeline/gateworker.py).

    Writes quality.json and quality.html to the stage folder (published with the run), moves
    failing rows to the rejects, and raises QualityGateError on a critical failure: nothing is
    published then, and the report is also written to OUT/gate_stopped/ for the operator."""
    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    result = _quality_result(lake, d, lo, hi, settings, verdict=True)
    summary = _report_or_stop(out, d, result)
    _write_checked(d, result)
    return summary


def stage_row_checks(lake, out, start, end, config=None, settings: Settings | None = None,
                     always: bool = False) -> dict:
    """The gate's row decisions only (no Great Expectations): the checked tables and the
    rejects, for alignment to go on while the verdict is computed elsewhere. Returns whether
    the row checks alone already fail the gate (the verdict will say why). `always`: write the
    checked tables even then (the Spark engine's buckets, whose verdict the driver decides over
    every bucket together: pipeline/sparkengine.py)."""
    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    result = _quality_result(lake, d, lo, hi, settings, verdict=False)
    _write_checked(d, result, always=always)
    return {"passed": result.passed, "rejected": int(len(result.rejects))}


def stage_gate_verdict(lake, out, start, end, config=None, settings: Settings | None = None) -> dict:
    """The gate's verdict on the loaded chunk: Great Expectations' evaluation compared with the
    row checks, the feed and volume checks, the report; QualityGateError on a critical failure.
    Writes the report only (stage_row_checks wrote the tables)."""
    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    return _report_or_stop(out, d, _quality_result(lake, d, lo, hi, settings, verdict=True))


def _quality_result(lake, d: Path, lo, hi, settings: Settings, verdict: bool):
    """run_quality over the stage's loaded tables; with `verdict`, Great Expectations too and the
    lake's trailing counts for the volume and feed checks."""
    from cardiosieve.pipeline.quality import BOTH, OWN, run_quality

    tables = {n: pd.read_parquet(d / f"{n}.parquet") for n in CHECKED_TABLES if (d / f"{n}.parquet").exists()}
    if not verdict:
        return run_quality(tables, hi, settings=settings, evaluator=OWN)
    load_rejects = pd.read_parquet(d / "rejects.parquet", columns=["table", "scope"])
    # Tonight's ECGs (not the prior ECGs of the history window) and the labs read for them.
    rejected = {"ecg": int(((load_rejects["table"] == "ecg") & (load_rejects["scope"] == "night")).sum()),
                "lab": int((load_rejects["table"] == "lab").sum())}
    contract = {t: (len(tables[t]) + n, n) for t, n in rejected.items() if t in tables}
    return run_quality(tables, hi, trailing_counts=trailing_counts(lake, lo, hi), settings=settings,
                       tonight_counts={"ecg": contract["ecg"][0]}, lab_volume=lab_volume(lake, lo, hi),
                       evaluator=BOTH, contract_rejects=contract)


def _report_or_stop(out, d: Path, result) -> dict:
    """Write the report to the stage folder; on a critical failure also to OUT/gate_stopped/
    and raise QualityGateError naming it. Returns the gate's summary (counts only)."""
    from cardiosieve.pipeline.publish import GATE_STOPPED
    from cardiosieve.pipeline.quality import QualityGateError, enforce, write_report

    paths = write_report(result, d)
    if not result.passed:
        stopped = write_report(result, private_dir(Path(out) / GATE_STOPPED))
        try:
            enforce(result)
        except QualityGateError as exc:
            raise QualityGateError(exc.failures + [f"report {stopped['html']}"]) from None
    checks = result.checks
    return {"checks": int(len(checks)), "failed": int((checks["passed"] == False).sum()),   # noqa: E712
            "warnings": int(((checks["passed"] == False) & (checks["severity"] == "warning")).sum()),  # noqa: E712
            "rejected": int(len(result.rejects)), "report": paths.get("html", ""),
            "rejects_by_check": {k: int(v) for k, v in result.rejects.groupby("reason").size().items()}}


def _write_checked(d: Path, result, always: bool = False) -> None:
    """The tables the gate let through and its rejects, for alignment (nothing when it failed,
    unless `always`). A table the gate removed no row from keeps its loaded file: `read_stage`
    reads that."""
    if result.passed or always:
        for n, df in result.clean.items():
            checked = d / f"{n}.checked.parquet"
            if len(df) == result.rows_in.get(n, -1):
                checked.unlink(missing_ok=True)
            else:
                write_parquet_atomic(df, checked)
        write_parquet_atomic(result.rejects, d / "rejects_quality.parquet")


def site_rules(settings: Settings):
    """The shipped screen rules with the site's [rules.*] overrides. The ST screen's "old prior
    ECG" limit follows the site's episode window ([windows] episode_h) unless the site sets
    [rules.st_deviation] prior_old_h itself: an elevation inside one episode is persistent, not old."""
    from cardiosieve.screens.criteria import load_rules

    overrides = {screen: dict(values) for screen, values in (settings.rules or {}).items()}
    episode_h = float(settings.windows["episode_h"])
    if episode_h != load_rules()["st_deviation"]["prior_old_h"].value:
        overrides.setdefault("st_deviation", {}).setdefault("prior_old_h", episode_h)
    return load_rules(overrides or None, source_name=settings.source)


def screen_leads(d: Path) -> pd.DataFrame:
    """The lead rows the screens read for a stage folder's aligned ECGs: the night's checked leads
    and the chosen prior ECGs' leads (what stage_screen passes to run_screens; the aligned
    archive keeps the same, pipeline/archive.py)."""
    from cardiosieve.pipeline.normalise import empty_table

    leads = [x for x in (read_stage(d, "ecg_lead"), read_stage(d, "prior_lead")) if x is not None]
    return pd.concat(leads, ignore_index=True) if leads else empty_table(c.ECG_LEAD)


def stage_screen(out, start, end, config=None, settings: Settings | None = None) -> dict:
    """Run every registered screen over the aligned night; write findings.parquet and each
    screen's criterion table, criteria_<screen>.parquet (one row per aligned ECG)."""
    from cardiosieve.screens import run_screens

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    rules = site_rules(settings)
    findings, tables = run_screens(pd.read_parquet(d / "aligned.parquet"), screen_leads(d), rules, with_criteria=True)
    write_parquet_atomic(findings, d / "findings.parquet")
    # Each screen's criterion table (screens/_table.py), for analysts to filter by any criterion.
    for name in rules.screens:
        path = d / f"criteria_{name}.parquet"
        if name in tables:
            write_parquet_atomic(tables[name].assign(rule_version=rules[name].version), path)
        else:
            path.unlink(missing_ok=True)     # an empty night: no table from an earlier run stays
    by = findings.groupby(["screen", "tier"]).size()
    counts: dict[str, dict[str, int]] = {}
    for (screen, tier), n in by.items():
        counts.setdefault(screen, {})[str(tier)] = int(n)
    return {"findings": int(len(findings)), "by_screen_tier": counts}


def chunk_run_id(lo: pd.Timestamp, hi: pd.Timestamp) -> str:
    """The run_id stage_worklist writes on the items a run (one chunk of a backfill) changes."""
    return f"{lo:%Y%m%dT%H%M%SZ}_{hi:%Y%m%dT%H%M%SZ}"


# A run over more than this is a backfill (or a run of several chunks): see run_interval.
BACKFILL_AFTER = pd.Timedelta(days=1)


def stage_worklist(out, start, end, config=None, db=None, settings: Settings | None = None,
                   earlier_run_ids=(), write: bool = True, backfill: bool | None = None) -> dict:
    """Fold findings into worklist items, upsert them into the database in one transaction, and
    write the night's worklist to the stage's worklist.parquet (published by stage_finish): the
    active items and the items this run inserted or changed, in queue order with the store's
    rank (store.read_worklist). `earlier_run_ids`: the run_ids of a backfill's earlier
    chunks, whose changed items belong to the run's worklist too. `write=False` (a backfill's
    earlier chunks, whose worklist.parquet stage_finish never publishes) skips the read-back and
    the file; the summary then has no by_screen. Every finding goes to the store's
    finding_history, with the item it folded into, in the upsert's transaction. `backfill`
    (run_interval sets it for a run of several chunks or more than a day; None: an interval of
    more than a day is one): new items are first flagged at their ECG's acquisition time, not
    at the chunk's end (worklist.build_items)."""
    from cardiosieve.pipeline import store, worklist

    settings = settings or load_settings(config)
    rules = site_rules(settings)
    lo, hi = interval(start, end)
    if backfill is None:
        backfill = hi - lo > BACKFILL_AFTER
    d = stage_dir(out, lo, hi)
    findings = pd.read_parquet(d / "findings.parquet")
    aligned = pd.read_parquet(d / "aligned.parquet")
    engine = store.open_store(db or store.sqlite_url(out))
    try:
        patients = sorted(set(findings["patient_id"]) | set(aligned["patient_id"]))
        existing = store.read_items(engine, patient_ids=patients)
        run_id = chunk_run_id(lo, hi)
        episode_h = settings.windows["episode_h"]
        folded = worklist.fold_findings(findings, aligned, existing, episode_h)
        items = worklist.build_items(findings, aligned, existing, run_id=run_id, now=hi, episode_h=episode_h,
                                     explainers=worklist.explainers_for(rules), backfill=backfill,
                                     folded=folded)
        db_counts = store.upsert_items(engine, items, history=worklist.history_rows(folded, run_id, hi))
        fault_point("after_commit")
        # What the screens read, kept for `cardiosieve replay` (pipeline/archive.py): written
        # after the commit, so that the archive never holds a chunk the store lacks.
        archive_chunk(out, lo, hi, aligned, screen_leads(d))
        fault_point("after_archive")
        if not write:
            (d / "worklist.parquet").unlink(missing_ok=True)   # none from an earlier run stays
            return {"items_tonight": int(len(items)), "db_counts": db_counts}
        ranked = store.read_worklist(engine, [run_id, *earlier_run_ids])
    finally:
        engine.dispose()
    ranked.attrs["caution"] = CAUTION                      # travels in the Parquet file's metadata
    write_parquet_atomic(ranked, d / "worklist.parquet")
    active = ranked[ranked["status"].isin(worklist.ACTIVE_STATUSES)] if len(ranked) else ranked
    return {"items_tonight": int(len(items)), "db_counts": db_counts,
            "by_screen": {k: int(v) for k, v in active.groupby("screen").size().items()} if len(active) else {}}


# A long backfill runs in chunks, in time order, so that memory stays bounded. Their length
# follows the lake: whole days, as many as hold at most CHUNK_ECG_ROWS ECG rows by the ECG
# partitions' footers (at least one day a chunk), so that a busy network's chunks are no larger
# than a quiet site's. Measured on the generated network year (docs/performance.md,
# 2026-12-04): 66,000, 100,000 and 200,000 rows a chunk took 143, 140 and 141 s (the length is
# no lever on speed) with the gate worker's peak memory at 1.6, 2.1 and 2.3 GB and the run's
# at 1.7, 1.7 and 2.1 GB.
CHUNK_ECG_ROWS = 100_000


def chunk_bounds(lake, lo: pd.Timestamp, hi: pd.Timestamp, chunk_days: float | None = None,
                 max_rows: int | None = None) -> list[pd.Timestamp]:
    """The chunk edges of [lo, hi): every `chunk_days` days when given; else whole days from
    `lo`, each chunk as many as hold at most `max_rows` ECG rows (default CHUNK_ECG_ROWS)
    counted from the partitions' footers (no data pages). An interval of a day or less is one
    chunk."""
    if chunk_days is not None:
        step = pd.Timedelta(days=chunk_days)
        bounds = [lo]
        while bounds[-1] + step < hi:
            bounds.append(bounds[-1] + step)
        return bounds + [hi]
    max_rows = CHUNK_ECG_ROWS if max_rows is None else max_rows
    day = pd.Timedelta(days=1)
    if hi - lo <= day:
        return [lo, hi]
    per_day = _rows_per_day(lake, c.ECG, lo.strftime("%Y-%m-%d"), (hi - pd.Timedelta(microseconds=1)).strftime("%Y-%m-%d"))
    bounds, rows, t = [lo], 0, lo
    while t < hi:
        n = per_day.get(t.strftime("%Y-%m-%d"), 0)
        if rows and n and rows + n > max_rows:
            bounds.append(t)
            rows = 0
        rows += n
        t += day
    return bounds + [hi]


def run_interval(lake, out, start, end, config=None, db=None, quality: bool = True,
                 chunk_days: float | None = None, gate=None) -> dict:
    """The whole job for ECGs acquired in [start, end); returns the run summary (counts and
    seconds per stage only) and writes it to OUT/run_summary.json beside the worklist, the
    aligned table and the rejects. A long interval runs chunk by chunk (`chunk_bounds`: sized
    by the lake's ECG rows, or every `chunk_days` days when given), in time order, so that the
    worklist folds episodes as nightly runs would.

    With the quality gate on, its verdict comes from a worker process (pipeline/gateworker.py):
    `gate`, one the caller started as early as it could (the CLI does, before importing this
    module), else one started here."""
    from cardiosieve.pipeline.publish import clean_leftovers
    from cardiosieve.pipeline.runlock import run_lock
    from cardiosieve.pipeline.store import check_store_url, sqlite_url

    settings = load_settings(config)
    lo, hi = interval(start, end)
    out = usable_out(out)
    check_store_url(db or sqlite_url(out))
    bounds = chunk_bounds(lake, lo, hi, chunk_days)
    # A backfill screens ECGs long after they were taken: its items are first flagged at their
    # ECG's time, not at a chunk's end (docs/prioritisation.md). A night is one chunk of a day.
    backfill = len(bounds) > 2 or hi - lo > BACKFILL_AFTER
    with run_lock(out, db or sqlite_url(out)), _gate(quality, config, gate) as gate:   # one run per OUT and store
        clean_leftovers(out)                      # what a crashed run left behind
        progress = Progress(bounds)
        parts = []
        chunks = list(zip(bounds[:-1], bounds[1:]))
        for k, (a, b) in enumerate(chunks):
            # Only the last chunk writes worklist.parquet (the one stage_finish publishes): the
            # run's active items and every item its chunks changed.
            last = k + 1 == len(chunks)
            earlier = [chunk_run_id(x, y) for x, y in chunks[:k]] if last else []
            parts.append(_run_chunk(lake, out, a, b, settings, db, gate, label=progress.label(k),
                                    write_worklist=last, earlier_run_ids=earlier, backfill=backfill))
            progress.done(k, parts[-1])
        summary = stage_finish(out, lo, hi, _add_up(parts) | {"chunks": len(parts)}, settings, bounds)
        log.info("run [%s, %s) published in %.1f s", lo.isoformat(), hi.isoformat(), progress.elapsed())
        return summary


class Progress:
    """Progress lines of a run over `bounds` (chunk edges): which chunk, how long it took, and an
    estimate of the time left from the pace so far (seconds per day screened; the first chunk
    also pays the start-up, so early estimates run high)."""

    def __init__(self, bounds: list[pd.Timestamp], clock=time.perf_counter):
        self.bounds, self.clock = bounds, clock
        self.t0 = clock()
        self.n = len(bounds) - 1
        self.days = [(b - a) / pd.Timedelta(days=1) for a, b in zip(bounds[:-1], bounds[1:])]

    def label(self, k: int) -> str:
        a, b = self.bounds[k], self.bounds[k + 1]
        return f"chunk {k + 1}/{self.n} [{a:%Y-%m-%d %H:%M}, {b:%Y-%m-%d %H:%M})"

    def elapsed(self) -> float:
        return self.clock() - self.t0

    def seconds_left(self, k: int) -> float:
        """After chunk k: the remaining days at the pace of the days done."""
        done = sum(self.days[:k + 1])
        return self.elapsed() / done * sum(self.days[k + 1:]) if done > 0 else float("nan")

    def done(self, k: int, part: dict) -> None:
        ecg = part.get("tables", {}).get("ecg", {})
        left = "" if k + 1 == self.n else f"; about {_duration(self.seconds_left(k))} left"
        log.info("%s: done, %s ECGs screened, %s items tonight (%.1f s in all%s)", self.label(k),
                 ecg.get("screened", "?"), part.get("worklist", {}).get("items_tonight", "?"), self.elapsed(), left)


def _duration(seconds: float) -> str:
    if seconds != seconds:
        return "an unknown time"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _gate(quality: bool, config, gate=None):
    """The quality gate's worker (pipeline/gateworker.py): the caller's, else one started now so
    that Great Expectations is imported while the run loads; none when the gate is off."""
    from contextlib import nullcontext

    from cardiosieve.pipeline.gateworker import GateWorker
    if not quality:
        return nullcontext()
    return nullcontext(gate) if gate is not None else GateWorker(config)


def usable_out(out) -> Path:
    """OUT as an owner-only folder the run can write in, made if missing; RunError (exit 2) for
    an existing file, a folder that cannot be made or one the run may not write in."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise RunError(f"--out {out} is a file, not a folder")
    try:
        private_dir(out)
    except PermissionError:
        raise RunError(f"--out {out}: no permission to create it") from None
    except FileExistsError:
        raise RunError(f"--out {out}: a file stands in its path") from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise RunError(f"--out {out}: no permission to write in it")
    return out


def stage_finish(out, start, end, summary: dict, settings: Settings | None = None,
                 chunk_bounds: list[pd.Timestamp] | None = None, config=None) -> dict:
    """The last stage: publish the run (pipeline/publish.py) as one folder holding rejects.parquet
    (every reject of the interval), aligned.parquet (every aligned ECG), the criterion tables,
    the worklist, the quality report and run_summary.json (the stage summaries put together with
    the reject counts by reason, the caution and the output paths), switched in as OUT's
    published state with one rename. `chunk_bounds` lists the boundaries of the chunks a
    backfill ran in; a single-chunk run passes none."""
    from cardiosieve.pipeline.publish import new_run_folder, prune, publish, published_names
    from cardiosieve.screens import SCREENS

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    bounds = chunk_bounds or [lo, hi]
    dirs = [stage_dir(out, a, b) for a, b in zip(bounds[:-1], bounds[1:])]
    rejects = pd.concat([all_rejects(d) for d in dirs], ignore_index=True)
    aligned = [pd.read_parquet(d / "aligned.parquet") for d in dirs]
    out = Path(out)
    folder = new_run_folder(out)
    try:
        write_parquet_atomic(rejects, folder / "rejects.parquet")
        write_parquet_atomic(pd.concat(aligned, ignore_index=True) if len(aligned) > 1 else aligned[0],
                             folder / "aligned.parquet")
        criteria = _concat_criteria(folder, dirs, SCREENS)
        for name in ("worklist.parquet", "quality.json", "quality.html"):   # the last chunk's
            if (dirs[-1] / name).exists():
                _link_or_copy(dirs[-1] / name, folder / name)
        summary = {**summary, "interval": [lo.isoformat(), hi.isoformat()], "config": settings.source,
                   "caution": CAUTION, "rejects_by_reason": _reasons(rejects)}
        if "quality" in summary:
            summary["quality"] = {**summary["quality"], "report": str(out / "quality.html")}
        summary["outputs"] = {"worklist": str(out / "worklist.parquet"), "aligned": str(out / "aligned.parquet"),
                              "rejects": str(out / "rejects.parquet"), "summary": str(out / "run_summary.json"),
                              **{f"criteria_{name}": str(out / f"criteria_{name}.parquet") for name in criteria}}
        write_json_atomic(summary, folder / "run_summary.json")
        run_id = f"{lo:%Y%m%dT%H%M%SZ}_{hi:%Y%m%dT%H%M%SZ}"
        final = publish(out, folder, run_id, published_names(SCREENS))
    except BaseException:
        import shutil
        shutil.rmtree(folder, ignore_errors=True)
        raise
    fault_point("after_switch")
    prune(out, keep_stage=dirs)
    return {**summary, "run_folder": str(final)}


def _concat_criteria(folder: Path, dirs: list[Path], screens) -> list[str]:
    """folder/criteria_<screen>.parquet: every chunk's criterion table of each screen, in time
    order; returns the screens written (a screen with no table this run, on an empty night,
    has no file, so none from an earlier run shows through)."""
    written = []
    for name in screens:
        parts = [pd.read_parquet(d / f"criteria_{name}.parquet") for d in dirs if (d / f"criteria_{name}.parquet").exists()]
        if parts:
            write_parquet_atomic(pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0],
                                 folder / f"criteria_{name}.parquet")
            written.append(name)
    return written


def _link_or_copy(src: Path, dst: Path) -> None:
    """dst as the same content as src: a hard link (stage files are replaced, never changed in
    place), or a copy where the file system has none."""
    try:
        os.link(src, dst)
    except OSError:
        import shutil
        shutil.copyfile(src, dst)


def _run_chunk(lake, out, lo, hi, settings: Settings, db, gate, label: str = "chunk",
               write_worklist: bool = True, earlier_run_ids=(), backfill: bool = False) -> dict:
    """One chunk through every stage. With a `gate` (pipeline/gateworker.py) the row checks run
    here and the verdict in the worker, awaited before the worklist stage: nothing reaches the
    store or the outputs unless the gate passed."""
    seconds = {}

    def timed(name, fn, *args, **kw):
        t = time.perf_counter()
        result = fn(*args, **kw)
        seconds[name] = round(time.perf_counter() - t, 3)
        log.debug("%s: %s %.2f s", label, name, seconds[name])
        return result

    loaded = timed("load", stage_load, lake, out, lo, hi, settings=settings)
    fault_point("after_load")
    summary = {"tables": loaded["tables"]}
    if gate is not None:
        gate.submit(lake, out, lo, hi)
        rows = timed("quality", stage_row_checks, lake, out, lo, hi, settings=settings)
        if not rows["passed"]:
            gate.result()                  # raises QualityGateError with the verdict's report
            raise RuntimeError("the quality gate's row checks failed but its verdict passed")
    summary["aligned"] = timed("align", stage_align, out, lo, hi, settings=settings, lake=lake)
    fault_point("after_align")
    summary["tables"]["ecg"]["screened"] = summary["aligned"]["aligned"]
    summary["findings"] = timed("screen", stage_screen, out, lo, hi, settings=settings)["by_screen_tier"]
    fault_point("after_screen")
    if gate is not None:
        summary["quality"] = timed("quality_wait", gate.result)
        fault_point("after_quality")
    summary["worklist"] = timed("worklist", stage_worklist, out, lo, hi, db=db, settings=settings,
                                earlier_run_ids=earlier_run_ids, write=write_worklist, backfill=backfill)
    summary["seconds"] = seconds
    return summary


def _add_up(parts: list[dict]) -> dict:
    """Sum the numbers of chunk summaries key by key; other values come from the last chunk."""
    def add(x, y):
        if isinstance(x, dict) and isinstance(y, dict):
            return {k: add(x[k], y[k]) if k in x and k in y else y.get(k, x.get(k)) for k in {**x, **y}}
        if isinstance(x, (int, float)) and isinstance(y, (int, float)) and not isinstance(x, bool):
            return x + y
        return y
    total = parts[0]
    for p in parts[1:]:
        total = add(total, p)
    return total
