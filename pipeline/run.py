"""The nightly job, in stages that the CLI runs in a row and the Airflow DAG runs as tasks.

Each stage reads what the previous one wrote under OUT/_stage/<start>_<end>/ and returns a small
dict of counts and paths (never rows): it is what lands in scheduler logs and XCom. Every file is
written to a temporary name and renamed, so a crash leaves the previous output whole and a rerun
of the same interval rewrites the same files.
"""
from __future__ import annotations

import json
import os
from datetime import datetime
from pathlib import Path

import pandas as pd

from pipeline import contract as c
from pipeline.config import Settings, load_settings

STAGE_DIR = "_stage"


class RunError(ValueError):
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
    return ts.as_unit("us")


def interval(start, end) -> tuple[pd.Timestamp, pd.Timestamp]:
    lo, hi = parse_instant(start, "start"), parse_instant(end, "end")
    if not lo < hi:
        raise RunError("--start must be before --end")
    return lo, hi


def stage_dir(out: str | Path, lo: pd.Timestamp, hi: pd.Timestamp) -> Path:
    d = Path(out) / STAGE_DIR / f"{lo:%Y%m%dT%H%M%SZ}_{hi:%Y%m%dT%H%M%SZ}"
    d.mkdir(parents=True, exist_ok=True)
    return d


def write_parquet(df: pd.DataFrame, path: Path) -> Path:
    """Write atomically: a temporary file in the same folder, then rename over the target."""
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    df.to_parquet(tmp, index=False)
    os.replace(tmp, path)
    return path


def write_json(obj: dict, path: Path) -> Path:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    tmp.write_text(json.dumps(obj, indent=2, sort_keys=True, default=str), encoding="utf-8")
    os.replace(tmp, path)
    return path


# ---------------------------------------------------------------------------------------------
# Stages

def stage_load(lake, out, start, end, config=None, settings: Settings | None = None) -> dict:
    """Read the night's ECGs and, for their patients only, what alignment needs; write them and
    the rejects. Returns counts per table (rows in = accepted + rejected)."""
    from pipeline.load import read_table

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    w = settings.windows
    d = stage_dir(out, lo, hi)

    night = read_table(lake, c.ECG, settings, scope="night", window=(lo, hi))
    pids = night.clean["patient_id"].unique().tolist()
    keep = {"patient_id": pids}
    history = read_table(lake, c.ECG, settings, scope="window", keep=keep,
                         window=(lo - pd.Timedelta(days=w["prior_ecg_max_days"]), lo))
    lab_codes = sorted(settings.analyte_of_code())
    lab = read_table(lake, c.LAB, settings, scope="window", keep={**keep, "analyte": lab_codes},
                     window=(lo - pd.Timedelta(hours=w["lab_before_h"] + w["k_trend_h"]),
                             hi + pd.Timedelta(hours=w["lab_after_h"])))
    patient = read_table(lake, c.PATIENT, settings, scope="window", keep=keep)
    medication = read_table(lake, c.MEDICATION, settings, scope="window", keep=keep,
                            window=(lo - pd.Timedelta(hours=w["medication_h"]), hi))
    ecg_history = pd.concat([history.clean, night.clean], ignore_index=True)
    lead_days = set(ecg_history["acquired_at"].dt.strftime("%Y-%m-%d").unique())
    leads = read_table(lake, c.ECG_LEAD, settings, scope="window", keep={"ecg_id": ecg_history["ecg_id"].tolist()},
                       days=_with_slack(lead_days))
    night_ids = set(night.clean["ecg_id"])
    lead_rejects = leads.rejects.copy()
    lead_rejects.loc[lead_rejects["row_key"].str.split("|").str[0].isin(night_ids), "scope"] = "night"

    loaded = {"ecg": night, "ecg_history": history, "lab": lab, "patient": patient,
              "medication": medication, "ecg_lead": leads}
    write_parquet(night.clean, d / "ecg.parquet")
    write_parquet(ecg_history, d / "ecg_history.parquet")
    write_parquet(lab.clean, d / "lab.parquet")
    write_parquet(patient.clean, d / "patient.parquet")
    write_parquet(leads.clean, d / "ecg_lead.parquet")
    has_medication = (Path(lake) / "medication").is_dir()
    if has_medication:
        write_parquet(medication.clean, d / "medication.parquet")
    elif (d / "medication.parquet").exists():
        (d / "medication.parquet").unlink()
    rejects = pd.concat([night.rejects, history.rejects, lab.rejects, patient.rejects,
                         medication.rejects, lead_rejects], ignore_index=True)
    write_parquet(rejects, d / "rejects.parquet")
    counts = {name: {"rows_in": t.rows_in, "accepted": len(t.clean), "rejected": len(t.rejects),
                     "files": t.files} for name, t in loaded.items()}
    return {"interval": [lo.isoformat(), hi.isoformat()], "stage_dir": str(d), "tables": counts,
            "rejects_by_reason": _reasons(rejects)}


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


def stage_align(out, start, end, config=None, settings: Settings | None = None) -> dict:
    """Align the loaded night (pure pandas; see pipeline/align.py) and write aligned.parquet."""
    from pipeline.align import align

    settings = settings or load_settings(config)
    lo, hi = interval(start, end)
    d = stage_dir(out, lo, hi)
    med_path = d / "medication.parquet"
    aligned = align(pd.read_parquet(d / "ecg.parquet"), pd.read_parquet(d / "ecg_history.parquet"),
                    pd.read_parquet(d / "lab.parquet"), pd.read_parquet(d / "patient.parquet"),
                    pd.read_parquet(med_path) if med_path.exists() else None, settings)
    write_parquet(aligned, d / "aligned.parquet")
    write_parquet(aligned, Path(out) / "aligned.parquet")
    return {"aligned": len(aligned),
            "with_potassium": int(aligned["k_mmol_l"].notna().sum()),
            "with_prior_ecg": int(aligned["prior_ecg_id"].notna().sum())}


def run_interval(lake, out, start, end, config=None, db=None) -> dict:
    """The whole nightly job for ECGs acquired in [start, end); returns the run summary (counts
    only) and writes it to OUT/run_summary.json beside OUT/rejects.parquet."""
    settings = load_settings(config)
    Path(out).mkdir(parents=True, exist_ok=True)
    loaded = stage_load(lake, out, start, end, settings=settings)
    aligned = stage_align(out, start, end, settings=settings)
    d = Path(loaded["stage_dir"])
    write_parquet(pd.read_parquet(d / "rejects.parquet"), Path(out) / "rejects.parquet")
    summary = {"interval": loaded["interval"], "config": settings.source, "tables": loaded["tables"],
               "rejects_by_reason": loaded["rejects_by_reason"], "aligned": aligned,
               "outputs": {"aligned": str(Path(out) / "aligned.parquet"),
                           "rejects": str(Path(out) / "rejects.parquet")}}
    write_json(summary, Path(out) / "run_summary.json")
    return summary
