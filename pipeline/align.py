"""Line every ECG up with the patient's labs, prior ECG, medication and demographics.

A pure function over the rows of a set of patients (no I/O, no clock): the same code can run per
patient bucket on a distributed engine. Every lookup names its anchor and bounds:

- nearest potassium, magnesium, calcium and troponin: collected in
  [acquired_at - lab_before_h, acquired_at + lab_after_h] (both edges included); the closest wins;
  at equal distance the one collected before the ECG wins (it describes the state the ECG shows);
  of results collected at the same moment the last resulted wins, then the greatest result_id.
- potassium trend: the patient's previous potassium, collected before the chosen one and at
  most k_trend_h before it.
- rejected potassium (`k_rejected_reason`): only when no accepted potassium was found, the reason
  code of the patient's latest REJECTED potassium row collected in the same lab window (latest
  collected_at; at one moment the greatest result_id), else null. The rows come from the caller
  (`lab_rejects`); a rejected row whose patient_id or collected_at could not be read cannot be
  placed and is not counted. Only the reason code travels, never the rejected value.
- prior ECG: the patient's most recent ECG acquired in
  [acquired_at - prior_ecg_max_days, acquired_at - prior_ecg_min_gap_h] (both edges included);
  ties at one moment go to the greatest ecg_id.
- medication: drugs administered in [acquired_at - medication_h, acquired_at].

Implemented with pandas.merge_asof on time-sorted keys (chosen by measurement, see
docs/performance.md); tests check it against an independent DuckDB SQL (tests/test_align_reference.py).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from cardiosieve.pipeline.config import Settings
from cardiosieve.pipeline.frames import whole_years

ANALYTE_PREFIX = {"potassium": "k", "magnesium": "mg", "calcium": "ca"}
PRIOR_COLUMNS = ["heart_rate_bpm", "rr_ms", "pr_ms", "qrs_ms", "qt_ms"]
_MIN = pd.Timedelta(minutes=1)


def align(ecg: pd.DataFrame, ecg_history: pd.DataFrame, lab: pd.DataFrame, patient: pd.DataFrame,
          medication: pd.DataFrame | None, settings: Settings,
          lab_rejects: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per row of `ecg` (the ECGs to screen), in ecg_id order, with the aligned columns.

    ecg_history holds the candidate prior ECGs (it may include `ecg` itself); lab holds labs of
    any analyte, already in canonical units; medication None means the lake has no such table.
    lab_rejects (optional) holds the rejected lab rows that can still be placed: patient_id,
    collected_at, analyte (as in `lab`), reason, and result_id if known; None means the caller
    passed none, and k_rejected_reason is then null throughout."""
    w = settings.windows
    out = ecg.sort_values("ecg_id", kind="stable").reset_index(drop=True)
    anchors = out[["ecg_id", "patient_id", "acquired_at"]].sort_values("acquired_at", kind="stable")

    out = out.merge(_demographics(anchors, patient), on="ecg_id", how="left")
    code_to_analyte = settings.analyte_of_code()
    analyte = lab["analyte"].map(code_to_analyte)
    before, after = pd.Timedelta(hours=w["lab_before_h"]), pd.Timedelta(hours=w["lab_after_h"])
    for name, prefix in ANALYTE_PREFIX.items():
        labs = _dedupe_same_moment(lab[analyte == name])
        near = nearest_in_window(anchors, labs, before, after)
        near = near.rename(columns={"value": f"{prefix}_mmol_l", "offset_min": f"{prefix}_offset_min",
                                    "hemolyzed": f"{prefix}_hemolyzed", "result_id": f"{prefix}_result_id"})
        if name == "potassium":
            near = near.merge(_previous_value(labs, pd.Timedelta(hours=w["k_trend_h"])), how="left",
                              left_on="k_result_id", right_on="result_id").drop(columns="result_id")
            near["k_prev_offset_min"] = (near.pop("prev_collected_at") - near["acquired_at"]) / _MIN
            near = near.rename(columns={"prev_value": "k_prev_mmol_l"})
            near["k_change_mmol_l"] = near["k_mmol_l"] - near["k_prev_mmol_l"]
        out = out.merge(near.drop(columns=["patient_id", "acquired_at", "collected_at"]), on="ecg_id", how="left")
    out = out.merge(_rejected_potassium(anchors, lab_rejects, code_to_analyte, before, after), on="ecg_id",
                    how="left")
    out["k_rejected_reason"] = out["k_rejected_reason"].where(out["k_mmol_l"].isna())
    out = out.merge(_troponin(anchors, lab[analyte == "troponin"], settings, before, after), on="ecg_id", how="left")
    out = out.merge(prior_ecg(anchors, ecg_history, pd.Timedelta(hours=w["prior_ecg_min_gap_h"]),
                              pd.Timedelta(days=w["prior_ecg_max_days"])), on="ecg_id", how="left")
    out = out.merge(_medication(anchors, medication, settings, pd.Timedelta(hours=w["medication_h"])),
                    on="ecg_id", how="left")
    return _finish_types(out)


# ---------------------------------------------------------------------------------------------
# Lookups

def nearest_in_window(anchors: pd.DataFrame, labs: pd.DataFrame, before: pd.Timedelta,
                      after: pd.Timedelta) -> pd.DataFrame:
    """For each anchor (ecg_id, patient_id, acquired_at; sorted by acquired_at) the lab of the
    same patient collected in [acquired_at - before, acquired_at + after] closest in time.

    `labs` must hold at most one row per patient and collected_at (see _dedupe_same_moment)."""
    right = labs[["patient_id", "collected_at", "value", "hemolyzed", "result_id"]].sort_values(
        "collected_at", kind="stable")
    back = pd.merge_asof(anchors, right, left_on="acquired_at", right_on="collected_at", by="patient_id",
                         direction="backward", tolerance=before, allow_exact_matches=True)
    fwd = pd.merge_asof(anchors, right, left_on="acquired_at", right_on="collected_at", by="patient_id",
                        direction="forward", tolerance=after, allow_exact_matches=True)
    gap_back = (back["acquired_at"] - back["collected_at"]).to_numpy()
    gap_fwd = (fwd["collected_at"] - fwd["acquired_at"]).to_numpy()
    use_fwd = ~pd.isna(gap_fwd) & (pd.isna(gap_back) | (gap_fwd < gap_back))
    chosen = back.copy()
    for col in ("collected_at", "value", "hemolyzed", "result_id"):
        chosen[col] = back[col].where(~use_fwd, fwd[col])
    chosen["offset_min"] = (chosen["collected_at"] - chosen["acquired_at"]) / _MIN
    return chosen


def _dedupe_same_moment(labs: pd.DataFrame) -> pd.DataFrame:
    """One result per patient and collection moment: the last resulted, then the greatest id."""
    ordered = labs.sort_values(["patient_id", "collected_at", "resulted_at", "result_id"], kind="stable",
                               na_position="first")
    return ordered.drop_duplicates(["patient_id", "collected_at"], keep="last")


def _previous_value(labs: pd.DataFrame, lookback: pd.Timedelta) -> pd.DataFrame:
    """For each result, the same patient's previous result of the analyte within `lookback`."""
    s = labs.sort_values(["patient_id", "collected_at"], kind="stable")
    same = s["patient_id"].eq(s["patient_id"].shift(1))
    prev_at = s["collected_at"].shift(1).where(same)
    prev_value = s["value"].shift(1).where(same)
    recent = (s["collected_at"] - prev_at) <= lookback
    return pd.DataFrame({"result_id": s["result_id"], "prev_value": prev_value.where(recent),
                         "prev_collected_at": prev_at.where(recent)}).reset_index(drop=True)


def latest_in_window(anchors: pd.DataFrame, rows: pd.DataFrame, before: pd.Timedelta,
                     after: pd.Timedelta, value: str) -> pd.DataFrame:
    """For each anchor (ecg_id, patient_id, acquired_at) the `value` of the same patient's row with
    the latest collected_at in [acquired_at - before, acquired_at + after] (both edges included);
    at one moment the row sorted last (callers sort ties). Columns: ecg_id, `value`."""
    right = rows[["patient_id", "collected_at", value]].dropna(subset=["patient_id", "collected_at"])
    right = right.drop_duplicates(["patient_id", "collected_at"], keep="last").sort_values("collected_at", kind="stable")
    left = anchors.assign(_until=anchors["acquired_at"] + after).sort_values("_until", kind="stable")
    got = pd.merge_asof(left, right, left_on="_until", right_on="collected_at", by="patient_id",
                        direction="backward", tolerance=before + after, allow_exact_matches=True)
    return got[["ecg_id", value]]


def _rejected_potassium(anchors, lab_rejects, code_to_analyte, before, after) -> pd.DataFrame:
    """k_rejected_reason per ECG: the reason of the latest rejected potassium in the lab window."""
    if lab_rejects is None or lab_rejects.empty:
        return anchors[["ecg_id"]].assign(k_rejected_reason=pd.Series(pd.NA, index=anchors.index, dtype="str"))
    rej = lab_rejects[lab_rejects["analyte"].map(code_to_analyte) == "potassium"]
    ties = ["patient_id", "collected_at"] + (["result_id"] if "result_id" in rej.columns else [])
    rej = rej.sort_values(ties, kind="stable", na_position="first")
    at = pd.to_datetime(rej["collected_at"], utc=True).astype(anchors["acquired_at"].dtype)  # merge keys' unit
    got = latest_in_window(anchors, rej.assign(collected_at=at), before, after, "reason")
    return got.rename(columns={"reason": "k_rejected_reason"})


def prior_ecg(anchors: pd.DataFrame, history: pd.DataFrame, min_gap: pd.Timedelta,
              max_age: pd.Timedelta) -> pd.DataFrame:
    """The patient's most recent ECG acquired in [acquired_at - max_age, acquired_at - min_gap]."""
    left = anchors.assign(_latest=anchors["acquired_at"] - min_gap).sort_values("_latest", kind="stable")
    right = history[["patient_id", "acquired_at", "ecg_id"] + PRIOR_COLUMNS].rename(
        columns={"acquired_at": "prior_acquired_at", "ecg_id": "prior_ecg_id",
                 **{c: f"prior_{c}" for c in PRIOR_COLUMNS}})
    right = right.sort_values(["prior_acquired_at", "prior_ecg_id"], kind="stable")
    got = pd.merge_asof(left, right, left_on="_latest", right_on="prior_acquired_at", by="patient_id",
                        direction="backward", tolerance=max_age - min_gap, allow_exact_matches=True)
    got["prior_gap_h"] = (got["acquired_at"] - got["prior_acquired_at"]) / pd.Timedelta(hours=1)
    return got.drop(columns=["patient_id", "acquired_at", "_latest"])


def _troponin(anchors, labs, settings: Settings, before, after) -> pd.DataFrame:
    url = {a.code: a.url_ng_l for a in settings.troponin}
    labs = _dedupe_same_moment(labs).assign(url=lambda d: d["analyte"].map(url).astype("float64"))
    near = nearest_in_window(anchors, labs, before, after)
    near = near.merge(labs[["result_id", "url"]], on="result_id", how="left")
    cols = {"value": "trop_ng_l", "offset_min": "trop_offset_min", "url": "trop_url_ng_l"}
    near = near.rename(columns=cols)[["ecg_id", *cols.values()]]
    # Every troponin of the patient in the window: a small frame (the night's patients only).
    pairs = anchors.merge(labs[["patient_id", "collected_at", "value", "url"]], on="patient_id")
    offset = pairs["collected_at"] - pairs["acquired_at"]
    pairs = pairs[(offset >= -before) & (offset <= after)].sort_values(["ecg_id", "collected_at"], kind="stable")
    g = pairs.assign(ratio=pairs["value"] / pairs["url"]).groupby("ecg_id", sort=False)
    agg = pd.DataFrame({"trop_max_ratio": g["ratio"].max(), "trop_n": g.size(),
                        "trop_delta_ng_l": g["value"].last() - g["value"].first()})
    agg.loc[agg["trop_n"] < 2, "trop_delta_ng_l"] = np.nan
    return near.merge(agg.reset_index(), on="ecg_id", how="left")


def _medication(anchors, medication, settings: Settings, lookback) -> pd.DataFrame:
    cols = ["qt_drug_count_24h", "loop_diuretic_24h", "k_lowering_24h"]
    if medication is None:
        return anchors[["ecg_id"]].assign(**{c: pd.NA for c in cols})
    pairs = anchors.merge(medication[["patient_id", "administered_at", "drug"]], on="patient_id")
    given = (pairs["administered_at"] <= pairs["acquired_at"]) & \
            (pairs["administered_at"] >= pairs["acquired_at"] - lookback)
    pairs = pairs[given]
    drug = pairs["drug"].str.strip().str.lower()
    classes = {k: set(v) for k, v in settings.drugs.items()}
    qt = pairs.assign(drug=drug)[drug.isin(classes.get("qt_prolonging", set()))]
    out = anchors[["ecg_id"]].set_index("ecg_id")
    out["qt_drug_count_24h"] = qt.groupby("ecg_id")["drug"].nunique()
    out["loop_diuretic_24h"] = drug.isin(classes.get("loop_diuretic", set())).groupby(pairs["ecg_id"]).any()
    out["k_lowering_24h"] = drug.isin(classes.get("k_lowering", set())).groupby(pairs["ecg_id"]).any()
    out["qt_drug_count_24h"] = out["qt_drug_count_24h"].fillna(0)
    out[["loop_diuretic_24h", "k_lowering_24h"]] = out[["loop_diuretic_24h", "k_lowering_24h"]].fillna(False)
    return out.reset_index()


def _demographics(anchors: pd.DataFrame, patient: pd.DataFrame) -> pd.DataFrame:
    """Sex and whole years of age at the ECG (NaN when the birth date is unknown)."""
    d = anchors.merge(patient[["patient_id", "sex", "birth_date"]], on="patient_id", how="left")
    d["age_years"] = whole_years(d["birth_date"], d["acquired_at"])
    return d[["ecg_id", "sex", "age_years"]]


def _finish_types(out: pd.DataFrame) -> pd.DataFrame:
    for prefix in ANALYTE_PREFIX.values():
        out[f"{prefix}_hemolyzed"] = out[f"{prefix}_hemolyzed"].astype("boolean")
    out["k_rejected_reason"] = out["k_rejected_reason"].astype("str")
    out["trop_n"] = out["trop_n"].fillna(0).astype("Int64")
    out["qt_drug_count_24h"] = out["qt_drug_count_24h"].astype("Int64")
    out["loop_diuretic_24h"] = out["loop_diuretic_24h"].astype("boolean")
    out["k_lowering_24h"] = out["k_lowering_24h"].astype("boolean")
    return out.sort_values("ecg_id", kind="stable").reset_index(drop=True)
