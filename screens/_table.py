"""One shape for every screen: the criterion table, and the shared steps that dress it.

Each screen computes a criterion table: one row per aligned ECG (same order), one typed column
per criterion and derived value, named with its unit (`qtc_fridericia_ms`, `k_band`,
`sign_qrs`, `ste_leads`, `territory_inferior`, `mod_k_low`), plus `tier` (NO_FINDING = 5 when
nothing was flagged) and the score parts. The decision lives in that table only; the findings
are dressed from it for the flagged rows, so the text cannot disagree with the decision, and a
QI analyst can filter the table by any criterion column (the run keeps it as
`criteria_<screen>.parquet` next to the aligned table).

The columns of each screen's table are documented in its module docstring, under a line
"Criterion table (column, unit, source)", one column a line: `name  unit  source  meaning`.
`documented_columns` reads that block, and a shared test checks it against the table.
"""

from __future__ import annotations

import re
from functools import cache
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from cardiosieve.screens._frame import NO_FINDING, SCORE_PART_KEYS, empty_findings
from cardiosieve.screens.criteria import Threshold

ID_COLUMNS = ["ecg_id", "patient_id", "acquired_at"]
# Score parts every screen's table carries as typed columns.
SCORE_COLUMNS = list(SCORE_PART_KEYS)

_HEADER = "Criterion table (column, unit, source)"


def criterion_table(aligned: pd.DataFrame, columns: dict[str, object]) -> pd.DataFrame:
    """The criterion table: the aligned ids (positional, same order) and `columns`, each an array
    or scalar of one value per row."""
    out = pd.DataFrame({c: aligned[c].to_numpy() for c in ID_COLUMNS})
    for name, values in columns.items():
        out[name] = values
    return out


def column_readers(table: pd.DataFrame) -> tuple[Callable[[str], np.ndarray], Callable[[str], np.ndarray]]:
    """(col, flag): a criterion column as an ndarray, and as a bool ndarray, each converted once
    however often the dressing of the flagged rows reads it."""
    return cache(lambda name: table[name].to_numpy()), cache(lambda name: table[name].to_numpy(dtype=bool))


def fired_rules(table: pd.DataFrame, pairs: Sequence[tuple[Threshold, str]], rows: np.ndarray) -> list[list[dict]]:
    """Evidence `rules` for the positional `rows`: each threshold whose bool column is true in that
    row, in the order of `pairs`, a threshold once. Declarative: the list is read off the same
    columns that made the decision, never re-evaluated."""
    if not pairs:
        return [[] for _ in rows]
    hits = np.column_stack([table[col].to_numpy(dtype=bool) for _, col in pairs])[rows]
    dicts = [th.as_dict() for th, _ in pairs]
    keys = [th.key for th, _ in pairs]
    out = []
    for row in hits:   # the flagged rows only, to build their evidence
        seen: set[str] = set()
        rules = []
        for j in np.flatnonzero(row):
            if keys[j] not in seen:
                seen.add(keys[j])
                rules.append(dicts[j])
        out.append(rules)
    return out


def lead_lists(mask: pd.DataFrame, order: Sequence[str]) -> np.ndarray:
    """Per row, the names of the true leads of a bool lead frame, comma-joined in `order` ("" when
    none): a text column of the criterion table, built without a per-row loop."""
    cols = [c for c in order if c in mask.columns]
    if not len(mask):
        return np.array([], dtype=object)
    m = mask[cols].to_numpy(dtype=bool)
    joined = np.where(m.any(axis=1), m @ np.array([f"{c}," for c in cols], dtype=object), "")
    return np.array([s[:-1] if s else "" for s in joined], dtype=object)


def split_leads(text: str) -> list[str]:
    """A lead-list cell back to its names."""
    return [x for x in str(text or "").split(",") if x]


def documented_columns(doc: str) -> dict[str, tuple[str, str]]:
    """{column: (unit, source)} from a module docstring's criterion-table block."""
    lines = (doc or "").splitlines()
    try:
        start = next(i for i, line in enumerate(lines) if line.strip() == _HEADER)
    except StopIteration:
        return {}
    out = {}
    for line in lines[start + 1:]:
        if not line.strip():
            break
        m = re.match(r"\s+(\S+)\s+(\S+)\s+(\S+)", line)
        if m:
            out[m.group(1)] = (m.group(2), m.group(3))
    return out


def dress_flagged(aligned: pd.DataFrame, compute: Callable[[], tuple[pd.DataFrame, object]],
                  dress: Callable[[pd.DataFrame, object, np.ndarray], pd.DataFrame], with_criteria: bool):
    """The one path of every screen: `compute()` gives the criterion table (and anything the
    dressing needs besides, e.g. per-lead values), `dress(table, extra, hit)` the findings of the
    flagged rows `hit`. Returns the findings, or (findings, table) with_criteria; no table for an
    empty aligned frame."""
    if len(aligned) == 0:
        table, findings = None, empty_findings()
    else:
        table, extra = compute()
        hit = np.flatnonzero(table["tier"].to_numpy() < NO_FINDING)
        findings = dress(table, extra, hit) if len(hit) else empty_findings()
    return (findings, table) if with_criteria else findings
