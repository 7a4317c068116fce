"""Lead names, contiguity and the long-to-wide turn of the ecg_lead table.

Contiguity decides whether two leads that meet a cut point make a finding [UDMI-2018]:
  lead groups        inferior II, III, aVF (any two of them are contiguous); lateral/apical I, aVL;
                     posterior V7, V8, V9 (any two); right-sided V3R, V4R
  precordial chain   V4R - V3R - V1 - V2 - V3 - V4 - V5 - V6 - V7 - V8 - V9: neighbours only
                     (V3R-V1 and V6-V7 as anatomic neighbours are a local reading)
The Cabrera circle aVL - I - (-aVR) - II - aVF - III is supporting evidence only: -aVR (aVR with
its sign inverted, so ST depression in aVR is elevation in -aVR) never makes a pair on its own,
and is recorded beside a finding when it agrees with it (common practice).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from cardiosieve.pipeline import contract
from cardiosieve.pipeline.frames import positions

# The lake contract's lead names (pipeline/contract.py), as lists: screens select frame columns
# with them and add them together.
LIMB = list(contract.LIMB_LEADS)
PRECORDIAL = list(contract.PRECORDIAL_LEADS)
RIGHT = list(contract.RIGHT_LEADS)
POSTERIOR = list(contract.POSTERIOR_LEADS)
STANDARD = LIMB + PRECORDIAL
ALL_LEADS = STANDARD + RIGHT + POSTERIOR

INFERIOR = ["II", "III", "aVF"]
HIGH_LATERAL = ["I", "aVL"]
# Lead groups of UDMI-2018: any two leads of one group are contiguous.
LEAD_GROUPS = [INFERIOR, HIGH_LATERAL, POSTERIOR, RIGHT]
PRECORDIAL_CHAIN = [*reversed(RIGHT), *PRECORDIAL, *POSTERIOR]   # V4R - V3R - V1 ... V6 - V7 - V8 - V9
CABRERA_CIRCLE = ["aVL", "I", "-aVR", "II", "aVF", "III"]   # supporting evidence only
# The order leads are named in summaries.
DISPLAY_ORDER = ["I", "II", "III", "aVR", "-aVR", "aVL", "aVF", *PRECORDIAL, *RIGHT, *POSTERIOR]


def pairs(chain: Sequence[str]) -> list[tuple[str, str]]:
    """Neighbouring pairs of a chain of leads."""
    return [(a, b) for a, b in zip(chain[:-1], chain[1:])]


def group_pairs(group: Sequence[str]) -> list[tuple[str, str]]:
    """Every pair of a lead group (any two of its leads are contiguous)."""
    return [(a, b) for i, a in enumerate(group) for b in group[i + 1:]]


def _unique(pair_list: list[tuple[str, str]]) -> list[tuple[str, str]]:
    seen: set[frozenset] = set()
    out = []
    for a, b in pair_list:
        if frozenset((a, b)) not in seen:
            seen.add(frozenset((a, b)))
            out.append((a, b))
    return out


CONTIGUOUS_PAIRS = _unique([p for g in LEAD_GROUPS for p in group_pairs(g)] + pairs(PRECORDIAL_CHAIN))


def wide(leads: pd.DataFrame, ecg_ids: pd.Series | np.ndarray, columns: Sequence[str]) -> dict[str, pd.DataFrame]:
    """For each value column, a float frame (one row per entry of `ecg_ids`, positional; one column per
    lead of ALL_LEADS plus "-aVR" = -aVR). Missing ECGs (None, NaN or an id without lead rows) or
    leads are NaN; a repeated (ecg_id, lead) keeps its first row (the quality checks report
    duplicates). Vectorised: ids and leads become integer positions, values are scattered into one
    array per column."""
    names = [*ALL_LEADS, "-aVR"]
    ids = pd.Series(np.asarray(ecg_ids, dtype=object)).astype("str")
    uniq_codes, uniq = pd.factorize(ids)              # -1 for a missing id
    m = len(uniq)
    grids = {c: np.full((m + 1, len(ALL_LEADS)), np.nan) for c in columns}   # row m stays NaN
    if leads is not None and len(leads) and m:
        row = positions(leads["ecg_id"], np.asarray(uniq, dtype=object))
        col = positions(leads["lead"], np.asarray(ALL_LEADS, dtype=object))
        hit = np.flatnonzero((row >= 0) & (col >= 0))
        _, first = np.unique(row[hit] * len(ALL_LEADS) + col[hit], return_index=True)
        hit = hit[first]                              # first row of each (ecg_id, lead)
        for c in columns:
            vals = pd.to_numeric(leads[c], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
            grids[c][row[hit], col[hit]] = vals[hit]
    take = np.where(uniq_codes >= 0, uniq_codes, m)
    out = {}
    for c in columns:
        g = grids[c][take]
        out[c] = pd.DataFrame(np.column_stack([g, -g[:, ALL_LEADS.index("aVR")]]), columns=names)
    return out
