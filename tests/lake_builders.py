"""Builders for small invented lakes: each contract column gets a dull default, so a test
shows only what matters to it. Timestamps given as strings are UTC."""
from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from cardiosieve.pipeline.codes import LOINC_POTASSIUM_SERUM
from cardiosieve.pipeline.contract import STANDARD_LEADS

UTC = "UTC"


def ts(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz=UTC).as_unit("us")


def ecg_row(ecg_id="E1", patient_id="P1", acquired_at="2026-11-29T10:00:00Z", **over) -> dict:
    row = dict(ecg_id=ecg_id, patient_id=patient_id, acquired_at=ts(acquired_at), heart_rate_bpm=60.0,
               rr_ms=1000.0, pr_ms=160.0, qrs_ms=90.0, qt_ms=400.0, p_axis_deg=50.0, qrs_axis_deg=40.0,
               t_axis_deg=40.0, paced=False, location="Ward 2")
    row.update(over)
    return row


def lead_rows(ecg_id="E1", **over_by_lead) -> list[dict]:
    rows = []
    for lead in STANDARD_LEADS:
        row = dict(ecg_id=ecg_id, lead=lead, p_amp_uv=100.0, r_amp_uv=800.0, s_amp_uv=-300.0, st_j_uv=0.0,
                   t_amp_uv=250.0)
        row.update(over_by_lead.get(lead, {}))
        rows.append(row)
    return rows


def lab_row(result_id="R1", patient_id="P1", collected_at="2026-11-29T09:00:00Z", analyte=LOINC_POTASSIUM_SERUM,
            value=4.2, unit="mmol/L", **over) -> dict:
    row = dict(result_id=result_id, patient_id=patient_id, collected_at=ts(collected_at),
               resulted_at=ts(collected_at) + pd.Timedelta(hours=1), analyte=analyte, value=value, unit=unit,
               hemolyzed=False)
    row.update(over)
    return row


def patient_row(patient_id="P1", sex="F", birth_date="1960-05-01") -> dict:
    return dict(patient_id=patient_id, sex=sex, birth_date=pd.Timestamp(birth_date).date())


def write_table(lake: Path, name: str, rows: list[dict] | pd.DataFrame, time_column: str | None = None,
                file_name: str = "part-0.parquet", schema: pa.Schema | None = None) -> list[Path]:
    """Write rows as hive partitions by the UTC date of time_column (flat when None)."""
    df = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows)
    root = Path(lake) / name
    paths = []
    if time_column is None:
        root.mkdir(parents=True, exist_ok=True)
        paths.append(_write(df, root / file_name, schema))
        return paths
    days = pd.to_datetime(df[time_column], utc=True).dt.strftime("%Y-%m-%d")
    for day, part in df.groupby(days.to_numpy()):
        folder = root / f"date={day}"
        folder.mkdir(parents=True, exist_ok=True)
        paths.append(_write(part, folder / file_name, schema))
    return paths


def _write(df: pd.DataFrame, path: Path, schema) -> Path:
    table = pa.Table.from_pandas(df, preserve_index=False, schema=schema)
    pq.write_table(table, path)
    return path


def write_lake(lake: Path, ecg=None, leads=None, labs=None, patients=None, medication=None) -> Path:
    """A minimal valid lake: every ECG gets 12 dull leads unless leads are given."""
    ecg = ecg if ecg is not None else [ecg_row()]
    write_table(lake, "ecg", ecg, "acquired_at")
    if leads is None:
        leads = [r for e in ecg for r in lead_rows(e["ecg_id"])]
        lead_days = {e["ecg_id"]: e["acquired_at"] for e in ecg}
        leads = pd.DataFrame(leads)
        leads["_at"] = leads["ecg_id"].map(lead_days)
        for day, part in leads.groupby(leads["_at"].dt.strftime("%Y-%m-%d")):
            folder = Path(lake) / "ecg_lead" / f"date={day}"
            folder.mkdir(parents=True, exist_ok=True)
            _write(part.drop(columns="_at"), folder / "part-0.parquet", None)
    else:
        write_table(lake, "ecg_lead", leads)
    write_table(lake, "lab", labs if labs is not None else [lab_row()], "collected_at")
    write_table(lake, "patient", patients if patients is not None else [patient_row()])
    if medication is not None:
        write_table(lake, "medication", medication, "administered_at")
    return Path(lake)


def write_partition(lake: Path, name: str, folder: str, rows: list[dict] | pd.DataFrame,
                    file_name: str = "part-9.parquet") -> Path:
    """Write rows into lake/name/folder whatever their times say (a misfiled export, a folder
    with a bad name): `folder` is the folder's name, e.g. "date=2026-11-29" or "date=yesterday"."""
    df = rows if isinstance(rows, pd.DataFrame) else pd.DataFrame(rows)
    path = Path(lake) / name / folder
    path.mkdir(parents=True, exist_ok=True)
    return _write(df, path / file_name, None)
