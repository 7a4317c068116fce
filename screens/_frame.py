"""Shared helpers of the screens: the findings frame, column access, JSON and plain-word formatting.

Nothing here decides anything clinical; the screens do. These helpers keep the output
shape identical across screens and the text formatting consistent.
"""

from __future__ import annotations

import math
from typing import Any, Iterable, Sequence

import numpy as np
import pandas as pd

from cardiosieve.pipeline.frames import whole_years
from cardiosieve.pipeline.jsontext import to_json
from cardiosieve.screens.criteria import as_float_array

FINDING_COLUMNS = [
    "ecg_id",
    "patient_id",
    "acquired_at",
    "screen",
    "tier",
    "score_parts",
    "summary",
    "evidence",
    "caveats",
    "territories",
    "rule_version",
]

FINDING_DTYPES = {
    "ecg_id": "str",
    "patient_id": "str",
    "acquired_at": "datetime64[us, UTC]",
    "screen": "str",
    "tier": "int64",
    "score_parts": "str",
    "summary": "str",
    "evidence": "str",
    "caveats": "str",
    "territories": "str",
    "rule_version": "str",
}

# The parts every finding's score_parts carries (screens may add their own after these).
SCORE_PART_KEYS = ("severity", "lab_confirmed", "lab_gap_min", "trend", "prior_present", "troponin_ratio")

TIER_MOST_URGENT = 1
TIER_LEAST_URGENT = 4
NO_FINDING = 5  # working value inside screens: "not flagged"


def empty_findings() -> pd.DataFrame:
    """A findings frame with no rows and the contract's columns and dtypes."""
    return pd.DataFrame({c: pd.Series([], dtype=FINDING_DTYPES[c]) for c in FINDING_COLUMNS})


# --------------------------------------------------------------------------- column access

def require_columns(df: pd.DataFrame, columns: Iterable[str], table: str = "aligned") -> None:
    """Raise KeyError naming the missing columns (names only, never values)."""
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise KeyError(f"{table} table lacks column(s): {', '.join(missing)}")


def num(df: pd.DataFrame, col: str) -> np.ndarray:
    """Column as a float ndarray (NA as NaN); all-NaN when the column is absent (optional inputs)."""
    if col not in df.columns:
        return np.full(len(df), np.nan)
    return as_float_array(df[col])


def flag(df: pd.DataFrame, col: str) -> tuple[np.ndarray, np.ndarray]:
    """A nullable boolean column as (is_true, is_known) bool ndarrays; absent column = all unknown."""
    if col not in df.columns:
        z = np.zeros(len(df), dtype=bool)
        return z, z.copy()
    s = df[col].astype("boolean")
    known = s.notna().to_numpy()
    return s.fillna(False).to_numpy(dtype=bool), known


def text(df: pd.DataFrame, col: str) -> np.ndarray:
    """A string column as an object ndarray with None for missing."""
    if col not in df.columns:
        return np.full(len(df), None, dtype=object)
    s = df[col]
    return np.where(s.isna().to_numpy(), None, s.astype(object).to_numpy()).astype(object)


def age_years(df: pd.DataFrame) -> np.ndarray:
    """Whole years at the ECG: `age_years` of the aligned table, else from `birth_date` and `acquired_at`."""
    if "age_years" in df.columns:
        return num(df, "age_years")
    if "birth_date" in df.columns:
        born = pd.to_datetime(df["birth_date"], utc=True)
        return as_float_array(whole_years(born, pd.to_datetime(df["acquired_at"], utc=True)))
    return np.full(len(df), np.nan)


def sex_masks(df: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(female, male, unknown) bool ndarrays from the `sex` column ("F", "M", else unknown)."""
    if "sex" not in df.columns:
        z = np.zeros(len(df), dtype=bool)
        return z, z.copy(), ~z
    s = df["sex"].astype(object)
    female = s.eq("F").to_numpy(dtype=bool)
    male = s.eq("M").to_numpy(dtype=bool)
    return female, male, ~(female | male)


# --------------------------------------------------------------------------- JSON
# to_json (strict JSON, NaN/NA as null, floats to 4 decimals) lives in pipeline/jsontext.py,
# imported above; screens import it from here.


def score_parts(
    *,
    severity: float,
    lab_confirmed: bool,
    lab_gap_min: float,
    trend: float,
    prior_present: bool,
    troponin_ratio: float = float("nan"),
    **extra: Any,
) -> dict[str, Any]:
    """The score_parts dict in its fixed key order; missing numbers become null in JSON."""
    parts = {
        "severity": float(min(max(severity, 0.0), 1.0)),
        "lab_confirmed": int(bool(lab_confirmed)),
        "lab_gap_min": abs(float(lab_gap_min)),
        "trend": float(trend),
        "prior_present": int(bool(prior_present)),
        "troponin_ratio": float(troponin_ratio),
    }
    parts.update(extra)
    return parts


def build_findings(
    rows: pd.DataFrame,
    *,
    screen: str,
    rule_version: str,
    tier: Sequence[int],
    parts: Sequence[dict],
    summary: Sequence[str],
    evidence: Sequence[dict],
    caveats: Sequence[Sequence[str]],
    territories: Sequence[str] | None = None,
) -> pd.DataFrame:
    """The findings frame for the flagged `rows` (a subset of the aligned table), in their order."""
    if len(rows) == 0:
        return empty_findings()
    n = len(rows)
    if territories is None:
        territories = [""] * n
    out = pd.DataFrame(
        {
            "ecg_id": rows["ecg_id"].astype("str").to_numpy(),
            "patient_id": rows["patient_id"].astype("str").to_numpy(),
            "acquired_at": pd.to_datetime(rows["acquired_at"], utc=True).dt.as_unit("us").to_numpy(),
            "screen": [screen] * n,
            "tier": np.asarray(tier, dtype="int64"),
            "score_parts": [to_json(p) for p in parts],
            "summary": list(summary),
            "evidence": [to_json({"rule_version": rule_version, **e}) for e in evidence],
            "caveats": [to_json(list(c)) for c in caveats],
            "territories": list(territories),
            "rule_version": [rule_version] * n,
        }
    )
    return out.astype(FINDING_DTYPES)[FINDING_COLUMNS]


# --------------------------------------------------------------------------- plain words

def fmt(x: float, nd: int = 0) -> str:
    """A number for a summary: "n/a" when missing, else rounded to `nd` decimals."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.{nd}f}"


def fmt_offset(minutes: float) -> str:
    """Signed minutes (collected - acquired) as "55 min before the ECG" / "2.5 h after the ECG"."""
    if minutes is None or math.isnan(minutes):
        return "at an unknown time"
    m = abs(float(minutes))
    when = "before" if minutes < 0 else "after"
    if m < 0.5:
        return "at the time of the ECG"
    amount = f"{m:.0f} min" if m < 120 else f"{m / 60:.1f} h"
    return f"{amount} {when} the ECG"


def fmt_leads(leads: Sequence[str], order: Sequence[str]) -> str:
    """Lead names in `order`, runs of neighbouring precordial leads as ranges: "V2-V4, II, aVF"."""
    chosen = [l for l in order if l in set(leads)]
    out: list[str] = []
    i = 0
    while i < len(chosen):
        j = i
        if chosen[i].startswith("V") and chosen[i][1:].isdigit():
            while (
                j + 1 < len(chosen)
                and chosen[j + 1].startswith("V")
                and chosen[j + 1][1:].isdigit()
                and int(chosen[j + 1][1:]) == int(chosen[j][1:]) + 1
            ):
                j += 1
        out.append(chosen[i] if j - i < 2 else f"{chosen[i]}-{chosen[j]}")
        if j - i == 1:
            out.append(chosen[j])
        i = j + 1
    return ", ".join(out)
