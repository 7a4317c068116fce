"""Findings with no follow-up in the lake: the core of a missed-findings review.

A finding on the worklist asks for an action; these rules look in the lake for the trace that
the action was taken. Each is a question for the team's own review, never a verdict on care:
the follow-up may have happened outside the lake's feeds, or been judged unnecessary.

The rules (docs/audit.md gives each one's rationale; the numbers are the site's [audit] keys)
    k_no_repeat           a hyperkalemia finding whose potassium is at or above
                          follow_up_k_mmol_l (6.5, the severe band of [UKKA-2020]) and no other
                          potassium collected in the follow_up_k_h (6 h, common practice) after
                          that one was collected.
    st_elevation_no_repeat
                          an ST-deviation finding of an elevation pattern (ST_ELEVATION_PATTERNS:
                          the UDMI-2018 cut points, and the equivalents the screen never ranks
                          below tier 2) and neither another ECG nor a troponin in the
                          follow_up_st_h (6 h, common practice) after the ECG.
    qt_drug_after         a long-QT finding with a QTc above follow_up_qtc_ms (500 ms, the
                          high-risk limit of [AHA-2010-TDP]) and a drug of the site's
                          qt_prolonging class given in the follow_up_qt_drug_h (24 h, a local
                          choice) after the ECG. Here the trace found is the concern.

Outcomes of each finding under its rule (FOLLOW_UP_OUTCOMES)
    as_expected     the follow-up is in the lake within the window (for qt_drug_after: no
                    QT-prolonging dose was given in it).
    to_review       the window has passed, the lake covers it, and the follow-up is not there
                    (for qt_drug_after: a QT-prolonging dose was given in it). The finding for
                    the analyst to look at.
    window_open     the window has not passed when the audit runs, or runs past the last day the
                    lake holds for the table it needs, and nothing settles it yet: not yet
                    known, never counted as missed.
    not_assessed    an input the rule needs is missing (the potassium's time, the QTc, the
                    medication feed): unknown, never reassurance.

Pure functions (frames in, frames out) and one reader of the lake (read_follow_up_inputs).
Counts in the summaries; the per-finding frame (item ids, patient ids) is for `--items` only.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

# ST-deviation patterns whose findings the ST rule follows (screens/st_deviation.py names them):
# elevation meeting the UDMI-2018 cut points, and the patterns the screen treats as its
# equivalents and never ranks below tier 2 (LBBB or paced by Sgarbossa/Smith, aVR with
# widespread depression, posterior). A depression alone or a not-evaluable ECG is not followed.
ST_ELEVATION_PATTERNS = ("st_elevation", "lbbb_or_paced", "avr_widespread_depression", "posterior_depression")

RULES = ("k_no_repeat", "st_elevation_no_repeat", "qt_drug_after")
RULE_SCREEN = {"k_no_repeat": "hyperkalemia", "st_elevation_no_repeat": "st_deviation",
               "qt_drug_after": "long_qt"}
AS_EXPECTED, TO_REVIEW, OPEN, NOT_ASSESSED = "as_expected", "to_review", "window_open", "not_assessed"
FOLLOW_UP_OUTCOMES = (AS_EXPECTED, TO_REVIEW, OPEN, NOT_ASSESSED)

# One row per finding checked (for --items): who and what, the rule, its window and outcome.
CHECK_COLUMNS = ["rule", "screen", "tier", "rule_version", "month", "item_id", "patient_id", "ecg_id",
                 "acquired_at", "anchor_at", "window_h", "outcome", "hours_to_next", "next_kind"]
FOLLOW_UP_COLUMNS = ["rule", "screen", "tier", "rule_version", "month", "findings", *FOLLOW_UP_OUTCOMES,
                     "window_h"]
FINDING_COLUMNS = ["item_id", "screen", "ecg_id", "patient_id", "acquired_at", "tier", "rule_version", "evidence"]


def _utc(s: pd.Series) -> pd.Series:
    return pd.to_datetime(s, utc=True).astype("datetime64[us, UTC]")


def latest_findings(history: pd.DataFrame, items: pd.DataFrame) -> pd.DataFrame:
    """One row per (screen, ECG): the latest run's finding of the findings history (store
    finding_history rows), and for an ECG no history row holds (items stored before the history
    was kept) the item's own current finding. FINDING_COLUMNS."""
    parts = []
    if len(history):
        h = history.sort_values("run_end_at", kind="mergesort").drop_duplicates(["screen", "ecg_id"], keep="last")
        parts.append(h[FINDING_COLUMNS])
    if len(items):
        own = items.rename(columns={"ecg_at": "acquired_at"})[FINDING_COLUMNS]
        if parts:
            seen = pd.MultiIndex.from_frame(parts[0][["screen", "ecg_id"]])
            own = own[~pd.MultiIndex.from_frame(own[["screen", "ecg_id"]]).isin(seen)]
        parts.append(own)
    if not parts:
        return pd.DataFrame(columns=FINDING_COLUMNS)
    out = pd.concat(parts, ignore_index=True)
    out["acquired_at"] = _utc(out["acquired_at"])
    return out.sort_values(["acquired_at", "screen", "ecg_id"], kind="mergesort").reset_index(drop=True)


def _values(evidence: pd.Series) -> pd.DataFrame:
    """The evidence JSON's `values` of each finding, the keys the rules read, as columns."""
    keys = ("k_mmol_l", "k_offset_min", "pattern", "qtc_ms")
    rows = [(json.loads(e) if isinstance(e, str) else (e or {})).get("values", {}) for e in evidence]
    return pd.DataFrame({k: [r.get(k) for r in rows] for k in keys}, index=evidence.index)


def follow_up_candidates(findings: pd.DataFrame, audit: dict) -> pd.DataFrame:
    """The findings each rule follows, with the instant its window opens (anchor_at, NaT when the
    finding lacks what places it) and the window's hours. `findings`: latest_findings' frame;
    `audit`: the site's [audit] settings."""
    f = findings.copy()
    v = _values(f["evidence"])
    at = _utc(f["acquired_at"])
    k = pd.to_numeric(v["k_mmol_l"], errors="coerce")
    qtc = pd.to_numeric(v["qtc_ms"], errors="coerce")
    k_at = at + pd.to_timedelta(pd.to_numeric(v["k_offset_min"], errors="coerce"), unit="min")
    picks = [
        ("k_no_repeat", f["screen"].eq("hyperkalemia") & (k >= audit["follow_up_k_mmol_l"]), k_at,
         audit["follow_up_k_h"]),
        ("st_elevation_no_repeat", f["screen"].eq("st_deviation") & v["pattern"].isin(ST_ELEVATION_PATTERNS), at,
         audit["follow_up_st_h"]),
        # A long-QT finding without a QTc (not evaluable) cannot be judged: not_assessed below.
        ("qt_drug_after", f["screen"].eq("long_qt") & ((qtc > audit["follow_up_qtc_ms"]) | qtc.isna()), at,
         audit["follow_up_qt_drug_h"]),
    ]
    parts = []
    for rule, chosen, anchor, hours in picks:
        part = f[chosen].assign(rule=rule, anchor_at=anchor[chosen], window_h=float(hours))
        if rule == "qt_drug_after":
            part.loc[qtc[chosen].isna().to_numpy(), "anchor_at"] = pd.NaT
        parts.append(part)
    out = pd.concat(parts, ignore_index=True)
    out["anchor_at"] = _utc(out["anchor_at"])
    out["acquired_at"] = _utc(out["acquired_at"])
    return out


def _next_event(cands: pd.DataFrame, events: pd.DataFrame) -> pd.Series:
    """Per candidate (cands' index): hours from anchor_at to the patient's first event strictly
    after it (events: patient_id, at); NaN when there is none. One merge_asof, no loop."""
    hours = pd.Series(np.nan, index=cands.index)
    have = cands["anchor_at"].notna()
    if not have.any() or events.empty:
        return hours
    left = cands.loc[have, ["patient_id", "anchor_at"]].reset_index().sort_values("anchor_at", kind="mergesort")
    right = events[["patient_id", "at"]].dropna().sort_values("at", kind="mergesort")
    right = right.assign(at=_utc(right["at"]), next_at=_utc(right["at"]))
    left = left.assign(anchor_at=_utc(left["anchor_at"]), patient_id=left["patient_id"].astype(str))
    right["patient_id"] = right["patient_id"].astype(str)
    m = pd.merge_asof(left, right[["patient_id", "at", "next_at"]], left_on="anchor_at", right_on="at",
                      by="patient_id", direction="forward", allow_exact_matches=False)
    hours.loc[m["index"].to_numpy()] = ((m["next_at"] - m["anchor_at"]) / pd.Timedelta(hours=1)).to_numpy()
    return hours


def check_follow_ups(cands: pd.DataFrame, inputs: dict, as_of: pd.Timestamp) -> pd.DataFrame:
    """CHECK_COLUMNS, one row per candidate: each rule's outcome (module docstring).

    `inputs` (read_follow_up_inputs): "potassium", "troponin", "ecg", "qt_drug" frames of
    (patient_id, at), "covered_until" table -> the first instant the lake does not hold (NaT:
    the table is absent), and "medication" (whether the lake has the medication feed)."""
    as_of = pd.Timestamp(as_of).tz_convert("UTC")
    out = cands.copy()
    out["hours_to_next"] = np.nan
    out["next_kind"] = ""
    covered = inputs["covered_until"]

    def known_until(*tables):
        ends = [covered.get(t, pd.NaT) for t in tables]
        return min([as_of, *ends]) if all(pd.notna(e) for e in ends) else pd.NaT

    for rule, events, tables in (("k_no_repeat", [("potassium", inputs["potassium"])], ("lab",)),
                                 ("st_elevation_no_repeat", [("ecg", inputs["ecg"]), ("troponin", inputs["troponin"])],
                                  ("lab", "ecg")),
                                 ("qt_drug_after", [("qt_drug", inputs["qt_drug"])], ("medication",))):
        mine = out["rule"].eq(rule)
        if not mine.any():
            continue
        c = out[mine]
        best = pd.Series(np.nan, index=c.index)
        kind = pd.Series("", index=c.index)
        for name, ev in events:
            h = _next_event(c, ev)
            sooner = h.notna() & (best.isna() | (h < best))
            best, kind = best.where(~sooner, h), kind.where(~sooner, name)
        window = c["window_h"]
        found = best.notna() & (best <= window)
        until = known_until(*tables)
        closes = c["anchor_at"] + pd.to_timedelta(window, unit="h")
        passed = pd.Series(False, index=c.index) if pd.isna(until) else (closes <= until)
        unknown = c["anchor_at"].isna() | pd.isna(until)
        if rule == "qt_drug_after":            # a dose in the window is the concern
            outcome = np.select([unknown, found, passed], [NOT_ASSESSED, TO_REVIEW, AS_EXPECTED], OPEN)
        else:
            outcome = np.select([unknown, found, passed], [NOT_ASSESSED, AS_EXPECTED, TO_REVIEW], OPEN)
        out.loc[mine, "outcome"] = outcome
        out.loc[mine, "hours_to_next"] = best.where(found)
        out.loc[mine, "next_kind"] = kind.where(found, "")
    if out.empty:
        return pd.DataFrame(columns=CHECK_COLUMNS)
    out["month"] = out["acquired_at"].dt.strftime("%Y-%m")
    out["tier"] = out["tier"].astype(int)
    return out[CHECK_COLUMNS].reset_index(drop=True)


def follow_up_summary(checks: pd.DataFrame) -> pd.DataFrame:
    """FOLLOW_UP_COLUMNS: per rule, screen, tier, rule version and month (of the ECG, UTC) the
    findings checked and how many ended in each outcome. Counts only."""
    if checks.empty:
        return pd.DataFrame(columns=FOLLOW_UP_COLUMNS)
    keys = ["rule", "screen", "tier", "rule_version", "month"]
    counts = pd.crosstab([checks[k] for k in keys], checks["outcome"])
    counts = counts.reindex(columns=list(FOLLOW_UP_OUTCOMES), fill_value=0)
    out = counts.reset_index()
    out.columns.name = None
    out["findings"] = out[list(FOLLOW_UP_OUTCOMES)].sum(axis=1)
    out["window_h"] = out["rule"].map(checks.groupby("rule")["window_h"].first())
    for c in ("findings", *FOLLOW_UP_OUTCOMES):
        out[c] = out[c].astype(int)
    return out[FOLLOW_UP_COLUMNS]


# ---------------------------------------------------------------------------------------------
# The lake (I/O): what the rules look for, for the findings' patients only
# ---------------------------------------------------------------------------------------------
def _covered_until(lake, table) -> pd.Timestamp:
    """The end of the last day the lake holds a partition of `table` for (NaT: none)."""
    from cardiosieve.pipeline.load import file_day, table_files

    days = [d for d in (file_day(lake, table, f) for f in table_files(lake, table)) if d]
    return pd.Timestamp(max(days), tz="UTC") + pd.Timedelta(days=1) if days else pd.NaT


def read_follow_up_inputs(lake, settings, cands: pd.DataFrame) -> dict:
    """The lake's potassium and troponin results, ECGs and QT-prolonging doses of the candidates'
    patients from their first anchor to the last window's end, as (patient_id, at) frames, read
    through the data contract (pipeline/load.py: rejected rows are not a follow-up), and how far
    each table reaches (check_follow_ups)."""
    from cardiosieve.pipeline import contract as c
    from cardiosieve.pipeline.load import read_table

    empty = pd.DataFrame({"patient_id": pd.Series(dtype=str), "at": pd.Series(dtype="datetime64[us, UTC]")})
    has_medication = (Path(lake) / c.MEDICATION.name).is_dir()
    covered = {"lab": _covered_until(lake, c.LAB), "ecg": _covered_until(lake, c.ECG),
               "medication": _covered_until(lake, c.MEDICATION) if has_medication else pd.NaT}
    inputs = {"potassium": empty, "troponin": empty, "ecg": empty, "qt_drug": empty, "covered_until": covered,
              "medication": has_medication}
    placed = cands[cands["anchor_at"].notna()]
    if placed.empty:
        return inputs
    lo = placed["anchor_at"].min()
    hi = (placed["anchor_at"] + pd.to_timedelta(placed["window_h"], unit="h")).max() + pd.Timedelta(seconds=1)
    keep = {"patient_id": sorted(placed["patient_id"].astype(str).unique())}
    codes = settings.analyte_of_code()
    lab = read_table(lake, c.LAB, settings, scope="window", window=(lo, hi),
                     keep={**keep, "analyte": sorted(codes)}, columns=["patient_id", "collected_at", "analyte"]).clean
    analyte = lab["analyte"].map(codes)
    inputs["potassium"] = lab.loc[analyte.eq("potassium"), ["patient_id", "collected_at"]].rename(columns={"collected_at": "at"})
    inputs["troponin"] = lab.loc[analyte.eq("troponin"), ["patient_id", "collected_at"]].rename(
        columns={"collected_at": "at"})
    ecg = read_table(lake, c.ECG, settings, scope="window", window=(lo, hi), keep=keep,
                     columns=["ecg_id", "patient_id", "acquired_at"]).clean
    inputs["ecg"] = ecg[["patient_id", "acquired_at"]].rename(columns={"acquired_at": "at"})
    if has_medication:
        med = read_table(lake, c.MEDICATION, settings, scope="window", window=(lo, hi), keep=keep).clean
        qt = set(settings.drugs.get("qt_prolonging", ()))
        given = med["drug"].astype(str).str.strip().str.lower().isin(qt)
        inputs["qt_drug"] = med.loc[given, ["patient_id", "administered_at"]].rename(columns={"administered_at": "at"})
    return inputs
