"""The screens: transparent rules from the aligned ECG table to a table of findings.

Each screen is one module, `screens/<name>.py`, holding
`screen_<name>(aligned, leads, rules=None, *, with_criteria=False) -> findings`: a pure function
(no I/O, no clock, inputs left unchanged). It first computes the screen's criterion table (one
row per ECG, one typed column per criterion, tier and score parts; screens/_table.py, columns in
the module docstring), then dresses the flagged rows from that table only. Adding a screen means
adding its module, its section in `screens/rules.toml`, and one line in `SCREENS` below.

Findings frame (FINDING_COLUMNS, in this order)
    ecg_id, patient_id (str); acquired_at (datetime64[us, UTC]); screen (str: hyperkalemia,
    long_qt, st_deviation); tier (int64, 1 most urgent .. 4); score_parts (JSON object);
    summary (one line, plain words, key values with units); evidence (JSON:
    {"rule_version", "values": {...}, "rules": [{"key","op","value","unit","source"}, ...],
    plus screen extras: hyperkalemia "signs", long_qt "tisdale"}); caveats (JSON list of
    texts); territories (comma-joined words of inferior, lateral, anterior, septal,
    posterior, right_ventricular; "" when none); rule_version (str, e.g. "long_qt/1.0.0",
    "long_qt/1.0.0+site.1a2b3c4d" when a site overrode one of its rules).

score_parts (JSON numbers; a missing number is null, read it as NaN)
    severity        0..1, how far into its tier the finding is (each screen documents its recipe)
    lab_confirmed   0/1, a laboratory value supports the finding (non-haemolysed K >= 5.5;
                    a low K/Mg/Ca modifier; troponin above its URL or rising)
    lab_gap_min     |minutes| between the deciding lab's collection and the ECG; null if none
    trend           signed change: K change mmol/L (hyperkalemia), QTc rise ms from the prior
                    ECG (long_qt), troponin delta ng/L (st_deviation); null when unknown
    prior_present   0/1, the patient has a prior ECG in the aligned window
    troponin_ratio  max troponin / its assay URL in the window (st_deviation); null otherwise
    Screens append their own after these (hyperkalemia: sign_count, hemolyzed; long_qt:
    qtc_ms, modifier_count, tisdale_points; st_deviation: max_st_uv, leads_meeting, reciprocal).
"""

from __future__ import annotations

from typing import Callable

import pandas as pd

from cardiosieve.screens._frame import FINDING_COLUMNS, SCORE_PART_KEYS, empty_findings
from cardiosieve.screens.criteria import Rules, Threshold, load_rules
from cardiosieve.screens.hyperkalemia import screen_hyperkalemia
from cardiosieve.screens.long_qt import screen_long_qt
from cardiosieve.screens.st_deviation import screen_st_deviation

ScreenFn = Callable[[pd.DataFrame, pd.DataFrame, Rules], pd.DataFrame]

SCREENS: dict[str, ScreenFn] = {
    "hyperkalemia": screen_hyperkalemia,
    "long_qt": screen_long_qt,
    "st_deviation": screen_st_deviation,
}


def run_screens(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None, *,
                with_criteria: bool = False):
    """All registered screens over the aligned ECGs, concatenated in registry order
    (within a screen, in the aligned table's row order); an empty findings frame when none.
    with_criteria: (findings, {screen: criterion table}), each table one row per aligned ECG
    (screens/_table.py); no tables when `aligned` is empty."""
    rules = rules or load_rules()
    results = {name: fn(aligned, leads, rules, with_criteria=True) for name, fn in SCREENS.items()}
    parts = [found for found, _ in results.values() if len(found)]
    findings = pd.concat(parts, ignore_index=True)[FINDING_COLUMNS] if parts else empty_findings()
    if not with_criteria:
        return findings
    return findings, {name: table for name, (_, table) in results.items() if table is not None}


__all__ = [
    "FINDING_COLUMNS",
    "SCORE_PART_KEYS",
    "SCREENS",
    "Rules",
    "Threshold",
    "empty_findings",
    "load_rules",
    "run_screens",
]
