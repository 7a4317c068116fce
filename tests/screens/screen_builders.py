"""Builders of aligned-table rows and ecg_lead rows with dull, normal defaults.

Every contract column gets a value that triggers no screen, so a test shows only what matters:
    ecg_rows(k_mmol_l=6.7)                       one aligned row, K 6.7 mmol/L
    ecg_rows(2, sex=["F", "M"])                  two rows; a list gives one value per row
    lead_rows("ecg-1", st_j_uv={"II": 150})      a normal 12-lead set, ST 150 uV in II
Named `screen_builders` (not conftest) so its import never collides with other test folders.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from cardiosieve.pipeline.contract import STANDARD_LEADS

ACQUIRED = pd.Timestamp("2026-03-01 10:00", tz="UTC")

STANDARD = list(STANDARD_LEADS)

# A normal adult 12-lead ECG in uV (common practice): upright P in II, dominant S in V1-V2,
# dominant R in I, V5, V6; no ST deviation; T well below the peaked-T cut points.
NORMAL_LEADS = {
    #        p_amp  r_amp   s_amp  st_j  t_amp
    "I":    (80,   700,   -100,  0.0, 250),
    "II":   (120,  1000,  -150,  0.0, 300),
    "III":  (40,   400,   -200,  0.0, 100),
    "aVR":  (-90,  100,   -700,  0.0, -250),
    "aVL":  (30,   400,   -300,  0.0, 100),
    "aVF":  (80,   700,   -150,  0.0, 200),
    "V1":   (50,   200,   -900,  0.0, 100),
    "V2":   (60,   400,   -1200, 0.0, 450),
    "V3":   (60,   700,   -800,  0.0, 450),
    "V4":   (60,   1200,  -500,  0.0, 400),
    "V5":   (60,   1400,  -300,  0.0, 350),
    "V6":   (60,   1100,  -200,  0.0, 250),
    "V3R":  (40,   200,   -700,  0.0, 50),
    "V4R":  (40,   200,   -600,  0.0, 50),
    "V7":   (40,   600,   -200,  0.0, 100),
    "V8":   (40,   500,   -200,  0.0, 80),
    "V9":   (40,   400,   -200,  0.0, 60),
}
LEAD_COLUMNS = ["p_amp_uv", "r_amp_uv", "s_amp_uv", "st_j_uv", "t_amp_uv"]


def _defaults(n: int) -> dict:
    na_int = pd.array([pd.NA] * n, dtype="Int64")
    na_bool = pd.array([pd.NA] * n, dtype="boolean")
    nan = [np.nan] * n
    return {
        "ecg_id": [f"ecg-{i + 1}" for i in range(n)],
        "patient_id": [f"pat-{i + 1}" for i in range(n)],
        "acquired_at": [ACQUIRED + pd.Timedelta(minutes=i) for i in range(n)],
        "heart_rate_bpm": [60.0] * n,
        "rr_ms": [1000.0] * n,
        "pr_ms": [160.0] * n,
        "qrs_ms": [90.0] * n,
        "qt_ms": [400.0] * n,
        "p_axis_deg": [50.0] * n,
        "qrs_axis_deg": [45.0] * n,
        "t_axis_deg": [40.0] * n,
        "paced": pd.array([False] * n, dtype="boolean"),
        "location": ["ED"] * n,
        "sex": ["M"] * n,
        "age_years": [55.0] * n,
        "k_mmol_l": [4.2] * n, "k_offset_min": [-30.0] * n,
        "k_hemolyzed": pd.array([False] * n, dtype="boolean"), "k_result_id": [f"lab-k-{i + 1}" for i in range(n)],
        "mg_mmol_l": [0.85] * n, "mg_offset_min": [-30.0] * n,
        "mg_hemolyzed": pd.array([False] * n, dtype="boolean"), "mg_result_id": [f"lab-mg-{i + 1}" for i in range(n)],
        "ca_mmol_l": [2.35] * n, "ca_offset_min": [-30.0] * n,
        "ca_hemolyzed": pd.array([False] * n, dtype="boolean"), "ca_result_id": [f"lab-ca-{i + 1}" for i in range(n)],
        "k_prev_mmol_l": nan, "k_prev_offset_min": nan, "k_change_mmol_l": nan,
        "trop_ng_l": nan, "trop_offset_min": nan, "trop_url_ng_l": nan, "trop_max_ratio": nan,
        "trop_delta_ng_l": nan, "trop_n": pd.array([0] * n, dtype="Int64"),
        "prior_ecg_id": [np.nan] * n,
        "prior_acquired_at": pd.Series([pd.NaT] * n, dtype="datetime64[us, UTC]"),
        "prior_gap_h": nan, "prior_heart_rate_bpm": nan, "prior_rr_ms": nan, "prior_pr_ms": nan,
        "prior_qrs_ms": nan, "prior_qt_ms": nan,
        "qt_drug_count_24h": na_int, "loop_diuretic_24h": na_bool, "k_lowering_24h": na_bool,
    }


DTYPES = {
    "ecg_id": "str", "patient_id": "str", "location": "str", "sex": "str", "k_result_id": "str",
    "mg_result_id": "str", "ca_result_id": "str", "prior_ecg_id": "str",
    "acquired_at": "datetime64[us, UTC]", "prior_acquired_at": "datetime64[us, UTC]",
    "paced": "boolean", "k_hemolyzed": "boolean", "mg_hemolyzed": "boolean", "ca_hemolyzed": "boolean",
    "loop_diuretic_24h": "boolean", "k_lowering_24h": "boolean", "qt_drug_count_24h": "Int64", "trop_n": "Int64",
}


def ecg_rows(n: int = 1, **overrides) -> pd.DataFrame:
    """`n` aligned rows with normal defaults; an override is a scalar (all rows) or a list (per row).
    Overriding heart_rate_bpm alone derives rr_ms = 60000 / HR, as the loader does."""
    data = _defaults(n)
    if "heart_rate_bpm" in overrides and "rr_ms" not in overrides:
        hr = overrides["heart_rate_bpm"]
        overrides["rr_ms"] = [60000.0 / h for h in hr] if isinstance(hr, list) else 60000.0 / hr
    for key, value in overrides.items():
        if key not in data:
            raise KeyError(f"ecg_rows: no aligned column {key!r}")
        data[key] = value if isinstance(value, list) else [value] * n
    df = pd.DataFrame(data)
    for col in df.columns:
        dtype = DTYPES.get(col, "float64")
        df[col] = df[col].astype(dtype)
    return df


def lead_rows(ecg_id: str = "ecg-1", leads: list[str] | None = None, **overrides: dict) -> pd.DataFrame:
    """ecg_lead rows of one ECG: the 12 standard leads (or `leads`) with normal amplitudes; each
    override is {lead: value} for one of p_amp_uv, r_amp_uv, s_amp_uv, st_j_uv, t_amp_uv."""
    names = list(leads) if leads is not None else list(STANDARD)
    for col, per_lead in overrides.items():
        if col not in LEAD_COLUMNS:
            raise KeyError(f"lead_rows: no lead column {col!r}")
        names += [l for l in per_lead if l not in names]
    rows = []
    for lead in names:
        vals = dict(zip(LEAD_COLUMNS, NORMAL_LEADS[lead]))
        for col, per_lead in overrides.items():
            if lead in per_lead:
                vals[col] = per_lead[lead]
        rows.append({"ecg_id": ecg_id, "lead": lead, **{c: float(v) for c, v in vals.items()}})
    df = pd.DataFrame(rows)
    return df.astype({"ecg_id": "str", "lead": "str", **{c: "float64" for c in LEAD_COLUMNS}})


def leads_of(*frames: pd.DataFrame) -> pd.DataFrame:
    """Several ECGs' lead rows as one ecg_lead table."""
    return pd.concat(frames, ignore_index=True)


def no_leads() -> pd.DataFrame:
    """An ecg_lead table with its columns and no rows."""
    return lead_rows().iloc[0:0]
