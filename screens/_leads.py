"""Lead names, contiguity and the long-to-wide turn of the ecg_lead table.

Contiguity (UDMI-2018; Cabrera order is common practice):
  limb-lead circle   aVL - I - (-aVR) - II - aVF - III     (no wrap from III back to aVL)
  precordial chain   V4R - V3R - V1 - V2 - V3 - V4 - V5 - V6 - V7 - V8 - V9
-aVR is aVR with its sign inverted, so ST depression in aVR is elevation in -aVR.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from pipeline.frames import isin

LIMB = ["I", "II", "III", "aVR", "aVL", "aVF"]
PRECORDIAL = ["V1", "V2", "V3", "V4", "V5", "V6"]
RIGHT = ["V3R", "V4R"]
POSTERIOR = ["V7", "V8", "V9"]
STANDARD = LIMB + PRECORDIAL
ALL_LEADS = STANDARD + RIGHT + POSTERIOR

LIMB_CIRCLE = ["aVL", "I", "-aVR", "II", "aVF", "III"]
PRECORDIAL_CHAIN = ["V4R", "V3R", "V1", "V2", "V3", "V4", "V5", "V6", "V7", "V8", "V9"]
# The order leads are named in summaries.
DISPLAY_ORDER = ["I", "II", "III", "aVR", "-aVR", "aVL", "aVF", *PRECORDIAL, *RIGHT, *POSTERIOR]


def pairs(chain: Sequence[str]) -> list[tuple[str, str]]:
    return [(a, b) for a, b in zip(chain[:-1], chain[1:])]


CONTIGUOUS_PAIRS = pairs(LIMB_CIRCLE) + pairs(PRECORDIAL_CHAIN)


def wide(leads: pd.DataFrame, ecg_ids: pd.Series | np.ndarray, columns: Sequence[str]) -> dict[str, pd.DataFrame]:
    """For each value column, a float frame (one row per entry of `ecg_ids`, positional; one column per
    lead of ALL_LEADS plus "-aVR" = -aVR). Missing ECGs or leads are NaN; a repeated (ecg_id, lead)
    keeps its first row (the quality checks report duplicates)."""
    ids = pd.Series(np.asarray(ecg_ids, dtype=object)).astype("str")
    n = len(ids)
    empty = {c: pd.DataFrame(np.full((n, len(ALL_LEADS) + 1), np.nan), columns=[*ALL_LEADS, "-aVR"]) for c in columns}
    if leads is None or len(leads) == 0 or n == 0:
        return empty
    wanted = set(ids.dropna())
    sub = leads.loc[isin(leads["ecg_id"], wanted), ["ecg_id", "lead", *columns]]
    if len(sub) == 0:
        return empty
    sub = sub.assign(ecg_id=sub["ecg_id"].astype("str"), lead=sub["lead"].astype("str"))
    sub = sub.drop_duplicates(["ecg_id", "lead"], keep="first")
    out = {}
    for c in columns:
        vals = pd.to_numeric(sub[c], errors="coerce").astype(float)
        w = (
            pd.DataFrame({"ecg_id": sub["ecg_id"].to_numpy(), "lead": sub["lead"].to_numpy(), "v": vals.to_numpy()})
            .pivot(index="ecg_id", columns="lead", values="v")
            .reindex(index=ids.to_numpy(), columns=ALL_LEADS)
        )
        w = w.astype(float).reset_index(drop=True)
        w.columns = list(ALL_LEADS)
        w["-aVR"] = -w["aVR"]
        out[c] = w
    return out


def lead_names(mask: pd.DataFrame, row: int) -> list[str]:
    """Names of the leads whose entry is true in positional `row` of a bool lead frame."""
    r = mask.iloc[row]
    return [str(k) for k, v in r.items() if bool(v)]
