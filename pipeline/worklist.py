"""Worklist items: a night's findings folded into one item per patient, screen and episode, ranked.

What it does
    build_items           findings (+ the stored items of the same patients) -> worklist items
    queue_order           the review queue's order (status group, tier, score, ECG time, item_id).
    rank_items            documented score and rank (the place in the review queue, 1 = review
                          first; none for explained or closed items); see docs/prioritisation.md.
                          The pipeline ranks in the store (store._rerank, the same order in SQL)
    apply_reopen_rule     a closed or explained item reopens only for a more severe finding
    EXPLAINERS            one hook per screen marking items that later data explain away

Everything here is pure: no files, no connections, no clock (the run passes `now`, its end
timestamp; pipeline/run.py publishes the worklist through pipeline/files.py). The worklist is a
screening aid for human review, never a diagnosis.

Sources
    UKKA-2020  UK Kidney Association clinical practice guideline, treatment of acute hyperkalaemia
               in adults (2020): mild 5.5-5.9 mmol/L (from memory; docs/references.md).
"""
from __future__ import annotations

import hashlib
import json
from typing import Callable

import numpy as np
import pandas as pd

from cardiosieve.pipeline.jsontext import loads_list, loads_object, plain
from cardiosieve.screens import FINDING_COLUMNS, SCORE_PART_KEYS

# ---------------------------------------------------------------------------------------------
# Statuses: the one place they are named. store.py and commands.py use these.
# ---------------------------------------------------------------------------------------------
STATUS_OPEN = "open"            # flagged, waiting for review
STATUS_REOPENED = "reopened"    # was closed or explained; a more severe finding followed
STATUS_EXPLAINED = "explained"  # later data explain the finding away (reason in status_reason)
STATUS_CLOSED = "closed"        # a reviewer recorded an outcome
STATUSES = (STATUS_OPEN, STATUS_REOPENED, STATUS_EXPLAINED, STATUS_CLOSED)
ACTIVE_STATUSES = (STATUS_OPEN, STATUS_REOPENED)
LOCKED_STATUSES = (STATUS_CLOSED, STATUS_EXPLAINED)   # only a more severe finding reopens these
# Rank groups: active items first, explained ones drop below them, closed ones last.
STATUS_RANK_GROUP = {STATUS_OPEN: 0, STATUS_REOPENED: 0, STATUS_EXPLAINED: 1, STATUS_CLOSED: 2}

ITEM_ID_PREFIX = "wl-"
ITEM_ID_HEX = 16                # 64 bits of sha1: collisions are negligible at worklist sizes
EPISODE_H = 72.0                # default episode window; site config [windows] episode_h

# The worklist contract columns, in order ...
CONTRACT_COLUMNS = ["item_id", "rank", "tier", "screen", "patient_id", "ecg_id", "ecg_at", "score",
                    "summary", "evidence", "caveats", "territories", "rule_version", "run_id",
                    "first_flagged_at"]
# ... then the bookkeeping the worklist keeps (status, last_updated_at) and what the episode
# folding, the reopen rule and the score need to be reproducible from the stored row alone.
ITEM_COLUMNS = CONTRACT_COLUMNS + ["status", "last_updated_at", "status_reason", "episode_start",
                                   "episode_end", "other_ecg_ids", "score_parts"]
TIMESTAMP_COLUMNS = ["ecg_at", "first_flagged_at", "last_updated_at", "episode_start", "episode_end"]
# An item's finding: what a reviewer reviewed, kept as it was while the item stays closed.
REVIEWED_FINDING_COLUMNS = ["tier", "ecg_id", "ecg_at", "summary", "evidence", "caveats", "territories",
                            "rule_version", "score_parts"]
# finding_history rows (pipeline/store.py): each finding of a run with the item it folded into.
HISTORY_COLUMNS = ["run_id", "run_end_at", "item_id", "screen", "ecg_id", "patient_id", "acquired_at", "tier",
                   "rule_version", "summary", "evidence", "caveats", "territories", "score_parts"]

# ---------------------------------------------------------------------------------------------
# Score (docs/prioritisation.md gives the formula and a worked example). Local choices.
# The weights add to 0.95, so score < 1 and sorting by (tier, -score) never lets a score
# carry an item past a more urgent tier.
# ---------------------------------------------------------------------------------------------
SCORE_WEIGHTS = {"severity": 0.45, "lab": 0.20, "trend": 0.10, "location": 0.10, "recency": 0.10}
LAB_GAP_SCALE_MIN = 1440.0      # lab closeness falls linearly to 0 at 24 h (the lab look-back window)
LAB_GAP_UNKNOWN = 0.5           # confirmed, but the gap is not given: half credit
RECENCY_SCALE_H = 72.0          # recency falls linearly to 0 at 72 h (the episode window)
SCORE_DECIMALS = 6
# Care location: case-insensitive regular expressions tried in order; first match wins.
# Acute areas first; outpatient and community last; unknown or unmatched gets the middle weight.
LOCATION_WEIGHTS = (
    (r"\b(?:ed|ae|a&e|emergency|resus|icu|itu|ccu|cicu|hdu|critical)\b", 1.0),
    (r"\b(?:outpatients?|opd|clinic|community|gp|pre-?op)\b", 0.0),
    (r"\b(?:wards?|inpatients?|admissions?|amu|cdu)\b", 0.5),
)
LOCATION_UNKNOWN = 0.5

# ---------------------------------------------------------------------------------------------
# Small helpers
# ---------------------------------------------------------------------------------------------
def _utc(s: pd.Series) -> pd.Series:
    """tz-aware UTC microsecond timestamps (naive input is taken as UTC only where it came
    from our own store, which keeps UTC; see store.py)."""
    s = pd.to_datetime(s)
    if s.dt.tz is None:
        s = s.dt.tz_localize("UTC")
    return s.dt.tz_convert("UTC").dt.as_unit("us")


def _utc_ts(t) -> pd.Timestamp:
    t = pd.Timestamp(t)
    if t.tzinfo is None:
        raise ValueError("now must be a tz-aware timestamp (the run's end)")
    return t.tz_convert("UTC").as_unit("us")


def _parts_frame(score_parts: pd.Series) -> pd.DataFrame:
    """score_parts JSON texts -> one numeric column per known key (NaN when absent)."""
    records = [loads_object(t) for t in score_parts]   # one parse per flagged row
    parts = pd.DataFrame.from_records(records, index=score_parts.index) if records else pd.DataFrame(index=score_parts.index)
    out = pd.DataFrame(index=score_parts.index)
    for key in SCORE_PART_KEYS:
        out[key] = pd.to_numeric(parts[key], errors="coerce") if key in parts else np.nan
    out["location"] = parts["location"].astype("str") if "location" in parts else pd.Series(np.nan, index=out.index, dtype="str")
    return out


def make_item_id(patient_id: pd.Series, screen: pd.Series, episode_start: pd.Series) -> pd.Series:
    """Stable id from what the item is about: patient, screen and episode start (UTC, ISO 8601).
    Never from the run, the row order or the rule version."""
    start = _utc(episode_start).dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    keys = patient_id.astype(str) + "|" + screen.astype(str) + "|" + start
    return keys.map(lambda k: ITEM_ID_PREFIX + hashlib.sha1(k.encode("utf-8")).hexdigest()[:ITEM_ID_HEX])


def location_weight(location: pd.Series, weights=LOCATION_WEIGHTS) -> pd.Series:
    """Care-location weight in [0, 1] from the ECG's location text (local choice, documented)."""
    text = location.astype("str").str.lower()
    out = pd.Series(np.nan, index=location.index, dtype=float)
    for pattern, weight in weights:
        hit = text.str.contains(pattern, regex=True, na=False) & out.isna()
        out = out.mask(hit, float(weight))
    return out.fillna(LOCATION_UNKNOWN)


def empty_items() -> pd.DataFrame:
    """An item frame with no rows and the right dtypes."""
    df = pd.DataFrame({c: pd.Series(dtype="str") for c in ITEM_COLUMNS})
    for c in TIMESTAMP_COLUMNS:
        df[c] = pd.Series(dtype="datetime64[us, UTC]")
    df["rank"] = pd.Series(dtype="Int64")
    df["tier"] = pd.Series(dtype="int64")
    df["score"] = pd.Series(dtype=float)
    return df


def normalise_items(items: pd.DataFrame) -> pd.DataFrame:
    """Item frame in ITEM_COLUMNS order with contract dtypes (store and tests use it)."""
    missing = [c for c in ITEM_COLUMNS if c not in items.columns and c not in ("rank", "score")]
    if missing:
        raise ValueError(f"worklist items lack columns: {', '.join(missing)}")
    df = items.copy()
    for c in ("rank", "score"):
        if c not in df.columns:
            df[c] = np.nan
    if df.empty:
        return empty_items()
    for c in TIMESTAMP_COLUMNS:
        df[c] = _utc(df[c])
    df["rank"] = pd.to_numeric(df["rank"]).astype("Int64")
    df["tier"] = pd.to_numeric(df["tier"]).astype("int64")
    df["score"] = pd.to_numeric(df["score"]).astype(float)
    for c in ITEM_COLUMNS:
        if c not in TIMESTAMP_COLUMNS and c not in ("rank", "tier", "score"):
            df[c] = df[c].astype("str")
    return df[ITEM_COLUMNS].reset_index(drop=True)


# ---------------------------------------------------------------------------------------------
# Score and rank
# ---------------------------------------------------------------------------------------------
def score_items(items: pd.DataFrame, location_weights=LOCATION_WEIGHTS) -> pd.Series:
    """Score in [0, 0.95] from score_parts, the ECG's care location and how recent it is
    relative to the run that scored it (last_updated_at). Formula: docs/prioritisation.md."""
    parts = _parts_frame(items["score_parts"])
    severity = parts["severity"].clip(0, 1).fillna(0.0)
    closeness = (1 - parts["lab_gap_min"].abs() / LAB_GAP_SCALE_MIN).clip(0, 1).fillna(LAB_GAP_UNKNOWN)
    lab = parts["lab_confirmed"].clip(0, 1).fillna(0.0) * closeness
    trend = parts["trend"].clip(0, 1).fillna(0.0)
    location = location_weight(parts["location"], location_weights)
    age_h = (_utc(items["last_updated_at"]) - _utc(items["ecg_at"])) / pd.Timedelta(hours=1)
    recency = (1 - age_h / RECENCY_SCALE_H).clip(0, 1).fillna(0.0)
    w = SCORE_WEIGHTS
    score = (w["severity"] * severity + w["lab"] * lab + w["trend"] * trend
             + w["location"] * location + w["recency"] * recency)
    return score.round(SCORE_DECIMALS)


def queue_order(items: pd.DataFrame) -> pd.DataFrame:
    """Items in the review queue's order: status group (open/reopened, then explained, then
    closed), tier (1 first), score (high first), ECG time (recent first), item_id (a fixed
    tie-break). Among the active items this is the order of `rank`."""
    group = items["status"].map(STATUS_RANK_GROUP).fillna(0).astype(int)
    key = pd.DataFrame({"_group": group, "tier": items["tier"], "score": items["score"], "ecg_at": items["ecg_at"],
                        "item_id": items["item_id"]}, index=items.index)
    order = key.sort_values(list(key.columns), ascending=[True, True, False, False, True], kind="mergesort").index
    return items.loc[order].reset_index(drop=True)


def rank_items(items: pd.DataFrame, location_weights=LOCATION_WEIGHTS) -> pd.DataFrame:
    """Items with `score` and `rank`, returned in queue order (`queue_order`). `rank` is the
    place in the review queue: 1 to n over the active items (open, reopened), 1 reviewed
    first; an explained or closed item has left the queue and has no rank (NA). The store
    ranks the same way in SQL (store._rerank)."""
    if items.empty:
        return normalise_items(items) if len(items.columns) else empty_items()
    df = items.copy()
    df["score"] = score_items(df, location_weights)
    df = queue_order(df)
    active = df["status"].isin(ACTIVE_STATUSES).to_numpy()
    rank = np.full(len(df), np.nan)
    rank[active] = np.arange(1, int(active.sum()) + 1)     # the active items come first
    df["rank"] = rank
    return normalise_items(df)


def severity_key(items: pd.DataFrame) -> pd.DataFrame:
    """tier and severity (from score_parts) side by side: what 'more severe' compares."""
    return pd.DataFrame({"tier": pd.to_numeric(items["tier"]),
                         "severity": _parts_frame(items["score_parts"])["severity"].fillna(0.0)},
                        index=items.index)


# ---------------------------------------------------------------------------------------------
# Reopen rule
# ---------------------------------------------------------------------------------------------
def apply_reopen_rule(items: pd.DataFrame, stored: pd.DataFrame | None) -> pd.DataFrame:
    """Keep a reviewer's decision: an item stored as closed (or explained) keeps that status and
    reason unless the incoming item is more severe (lower tier, or same tier and higher
    severity), in which case it becomes `reopened` with the reason. Idempotent."""
    if stored is None or stored.empty or items.empty:
        return items
    df = items.copy()
    old = stored[["item_id", "status", "status_reason", "tier", "score_parts"]].drop_duplicates("item_id")
    old = old.rename(columns={"status": "old_status", "status_reason": "old_reason"})
    old_key = severity_key(old).add_prefix("old_")
    old = pd.concat([old[["item_id", "old_status", "old_reason"]], old_key], axis=1)
    m = df[["item_id"]].merge(old, on="item_id", how="left")
    m.index = df.index
    new_key = severity_key(df)
    locked = m["old_status"].isin(LOCKED_STATUSES)
    more = (new_key["tier"] < m["old_tier"]) | (
        (new_key["tier"] == m["old_tier"]) & (new_key["severity"] > m["old_severity"]))
    reopen = locked & more
    keep = locked & ~more
    df["status"] = df["status"].mask(keep, m["old_status"]).mask(reopen, STATUS_REOPENED)
    df["status_reason"] = df["status_reason"].astype("str").mask(keep, m["old_reason"])
    _keep_reviewed_finding(df, stored, keep & m["old_status"].eq(STATUS_CLOSED))
    for i in df.index[reopen]:   # the few reopened items get their reason written out
        df.loc[i, "status_reason"] = (
            f"reopened: a more severe finding (tier {int(new_key.loc[i, 'tier'])}, severity "
            f"{new_key.loc[i, 'severity']:.2f}) followed the {m.loc[i, 'old_status']} item "
            f"(tier {int(m.loc[i, 'old_tier'])}, severity {m.loc[i, 'old_severity']:.2f})")
    return df


def _keep_reviewed_finding(df: pd.DataFrame, stored: pd.DataFrame, kept: pd.Series) -> None:
    """In place: the rows `kept` (closed items that stay closed) get back the finding the
    reviewer saw (REVIEWED_FINDING_COLUMNS, from `stored`): a rerun under other rules, or a
    milder finding joining the episode, never rewrites what was reviewed, its rule_version
    included. The episode still grows (episode_start, episode_end, other_ecg_ids); the new
    findings are in the store's finding_history. Columns `stored` lacks are left as they are."""
    if not kept.any():
        return
    cols = [c for c in REVIEWED_FINDING_COLUMNS if c in stored.columns and c in df.columns]
    old = stored.drop_duplicates("item_id").set_index("item_id")
    ids = df.loc[kept, "item_id"]
    if "ecg_id" in cols and "other_ecg_ids" in df.columns:
        for i in ids.index:   # the few closed items a night touches: the primary ECG moves back
            was, now = str(old.loc[ids[i], "ecg_id"]), str(df.loc[i, "ecg_id"])
            if was != now:
                others = (set(loads_list(df.loc[i, "other_ecg_ids"])) | {now}) - {was}
                df.loc[i, "other_ecg_ids"] = json.dumps(sorted(others))
    for c in cols:
        restored = ids.map(old[c])
        if c in TIMESTAMP_COLUMNS:
            restored = _utc(restored)
        df.loc[kept, c] = restored


# ---------------------------------------------------------------------------------------------
# Explained away: one hook per screen. Each takes the active items of its screen and the aligned
# table and returns a reason (str) per item, NaN where the item is not explained away.
# ---------------------------------------------------------------------------------------------
def explain_hyperkalemia(items: pd.DataFrame, aligned: pd.DataFrame,
                         k_normal_below: float | None = None) -> pd.Series:
    """An item decided by a haemolysed potassium is explained away when a later potassium of the
    same patient, from a specimen known not to be haemolysed (NA does not count), is below
    `k_normal_below`: the hyperkalemia screen's mild band `k_mild` (5.5 mmol/L [UKKA-2020] in
    screens/rules.toml when None; a site's override through explainers_for). Haemolysis raises
    measured potassium (pseudohyperkalaemia).

    The deciding potassium (k_mmol_l, k_hemolyzed, k_offset_min, k_result_id) comes from the
    item's evidence values, else from the aligned row of its ECG; the later ones from the aligned
    table (collected_at = acquired_at + k_offset_min)."""
    reasons = pd.Series(np.nan, index=items.index, dtype="str")
    need = {"patient_id", "acquired_at", "k_mmol_l", "k_offset_min", "k_hemolyzed"}
    if items.empty or aligned is None or aligned.empty or not need <= set(aligned.columns):
        return reasons
    cols = ["k_mmol_l", "k_hemolyzed", "k_offset_min", "k_result_id"]
    values = pd.DataFrame.from_records(
        [loads_object(e).get("values", {}) or {} for e in items["evidence"]], index=items.index)
    dec = pd.DataFrame(index=items.index)
    for c in cols:
        dec[c] = values[c] if c in values else np.nan
    own = aligned.drop_duplicates("ecg_id").set_index("ecg_id")
    from_aligned = items[["ecg_id"]].join(own[[c for c in cols if c in own.columns]], on="ecg_id")
    for c in cols:
        if c in from_aligned:
            dec[c] = dec[c].astype(object).where(dec[c].notna(), from_aligned[c].astype(object))
    dec["item_index"] = items.index
    dec["patient_id"] = items["patient_id"].astype(str)
    dec["k_dec"] = pd.to_numeric(dec["k_mmol_l"], errors="coerce")
    dec["dec_at"] = _utc(items["ecg_at"]) + pd.to_timedelta(pd.to_numeric(dec["k_offset_min"], errors="coerce"), unit="min")
    dec["dec_result"] = dec["k_result_id"].astype("str")
    dec = dec[dec["k_hemolyzed"].map(lambda v: v is True or v is np.True_) & dec["dec_at"].notna()]
    if dec.empty:
        return reasons

    if k_normal_below is None:
        from cardiosieve.screens.criteria import load_rules
        k_normal_below = load_rules()["hyperkalemia"]["k_mild"].value
    later = aligned[aligned["k_mmol_l"].notna()].copy()
    later["later_at"] = _utc(later["acquired_at"]) + pd.to_timedelta(later["k_offset_min"], unit="min")
    not_haem = later["k_hemolyzed"].astype("boolean").eq(False).fillna(False)
    later = later[not_haem & (later["k_mmol_l"] < k_normal_below)]
    later["later_result"] = later["k_result_id"].astype("str") if "k_result_id" in later else np.nan
    later["patient_id"] = later["patient_id"].astype(str)
    later = later.drop_duplicates(["patient_id", "later_at", "k_mmol_l"])
    m = dec[["item_index", "patient_id", "k_dec", "dec_at", "dec_result"]].merge(
        later[["patient_id", "later_at", "k_mmol_l", "later_result"]], on="patient_id")
    m = m[(m["later_at"] > m["dec_at"]) & ~(m["later_result"].notna() & m["later_result"].eq(m["dec_result"]))]
    if m.empty:
        return reasons
    first = m.sort_values(["item_index", "later_at"]).drop_duplicates("item_index")
    for row in first.itertuples():   # a handful of explained items
        gap_h = (row.later_at - row.dec_at) / pd.Timedelta(hours=1)
        reasons.loc[row.item_index] = (
            f"explained: repeat potassium {row.k_mmol_l:.1f} mmol/L from a specimen not haemolysed, "
            f"collected {gap_h:.1f} h after the haemolysed {row.k_dec:.1f} mmol/L that flagged it")
    return reasons


EXPLAINERS: dict[str, Callable[[pd.DataFrame, pd.DataFrame], pd.Series]] = {
    "hyperkalemia": explain_hyperkalemia,
}


def explainers_for(rules) -> dict[str, Callable[[pd.DataFrame, pd.DataFrame], pd.Series]]:
    """EXPLAINERS with the thresholds of the run's rules (screens/rules.toml plus site overrides),
    so that "back to normal" means below the same band the screen flags from."""
    from functools import partial

    return {**EXPLAINERS,
            "hyperkalemia": partial(explain_hyperkalemia, k_normal_below=rules["hyperkalemia"]["k_mild"].value)}


def apply_explainers(items: pd.DataFrame, aligned: pd.DataFrame | None, explainers=None) -> pd.Series:
    """Boolean mask of items newly explained away; sets their status and status_reason in place."""
    explainers = EXPLAINERS if explainers is None else explainers
    changed = pd.Series(False, index=items.index)
    if aligned is None or items.empty:
        return changed
    for screen, explain in explainers.items():
        sub = items[items["screen"].eq(screen) & items["status"].isin(ACTIVE_STATUSES)]
        if sub.empty:
            continue
        reason = explain(sub, aligned).reindex(sub.index)
        hit = reason.index[reason.notna()]
        items.loc[hit, "status"] = STATUS_EXPLAINED
        items.loc[hit, "status_reason"] = reason.loc[hit]
        changed.loc[hit] = True
    return changed


# ---------------------------------------------------------------------------------------------
# Findings -> items
# ---------------------------------------------------------------------------------------------
def _episodes(new: pd.DataFrame, old: pd.DataFrame, episode_h: float) -> pd.DataFrame:
    """Give each new finding an item_id. Findings and stored items (as [episode_start,
    episode_end] intervals) of one patient and screen are swept in time order; a gap of more than
    episode_h from everything before starts a new cluster. A finding in a cluster holding stored
    items joins the latest stored item that started at or before it (else the cluster's first);
    a cluster of new findings only gets a new id from its start."""
    keys = ["patient_id", "screen"]
    iv_new = pd.DataFrame({"patient_id": new["patient_id"].astype(str), "screen": new["screen"].astype(str),
                           "start": new["acquired_at"], "end": new["acquired_at"], "old": 1,
                           "item_id": pd.Series(np.nan, index=new.index, dtype="str"), "row": new.index})
    iv_old = pd.DataFrame({"patient_id": old["patient_id"].astype(str), "screen": old["screen"].astype(str),
                           "start": old["episode_start"], "end": old["episode_end"], "old": 0,
                           "item_id": old["item_id"].astype(str), "row": -1})
    iv = pd.concat([iv_old, iv_new], ignore_index=True) if len(iv_old) else iv_new.reset_index(drop=True)
    iv = iv.sort_values(keys + ["start", "old", "item_id", "row"], kind="mergesort").reset_index(drop=True)
    group_start = ~iv[keys].eq(iv[keys].shift()).all(axis=1)
    reach = iv.groupby(keys, sort=False)["end"].cummax().shift()   # latest end seen before this row
    gap = iv["start"] - reach
    iv["cluster"] = (group_start | (gap > pd.Timedelta(hours=episode_h))).cumsum()

    olds = iv[iv["old"].eq(0)]
    news = iv[iv["old"].eq(1)].copy()
    joined = news.sort_values("start")
    if len(olds):
        joined = pd.merge_asof(joined.drop(columns="item_id"),
                               olds[["start", "cluster", "item_id"]].sort_values("start"),
                               on="start", by="cluster", direction="backward")
        first_old = olds.drop_duplicates("cluster").set_index("cluster")["item_id"]
        joined["item_id"] = joined["item_id"].fillna(joined["cluster"].map(first_old))
    cluster_start = news.groupby("cluster")["start"].min()
    fresh = joined["item_id"].isna()
    if fresh.any():
        joined.loc[fresh, "item_id"] = make_item_id(
            joined.loc[fresh, "patient_id"], joined.loc[fresh, "screen"],
            joined.loc[fresh, "cluster"].map(cluster_start)).to_numpy()
    return joined.set_index("row")["item_id"].reindex(new.index)


def fold_findings(findings: pd.DataFrame, aligned: pd.DataFrame | None, existing: pd.DataFrame | None,
                  episode_h: float = EPISODE_H) -> pd.DataFrame:
    """The findings (FINDING_COLUMNS) as build_items folds them: acquired_at in UTC, the ECG's
    care location added to score_parts (from `aligned`, so that the score can be recomputed
    from a stored row alone), and `item_id`, the item each folds into (a stored item of
    `existing` within episode_h of the same patient and screen, else a new one)."""
    missing = [c for c in FINDING_COLUMNS if c not in findings.columns]
    if missing:
        raise ValueError(f"findings lack columns: {', '.join(missing)}")
    ex = normalise_items(existing) if existing is not None and len(existing) else empty_items()
    f = findings[FINDING_COLUMNS].copy()
    f["acquired_at"] = _utc(f["acquired_at"]) if len(f) else pd.Series(dtype="datetime64[us, UTC]")
    loc = pd.Series(np.nan, index=f.index, dtype="str")
    if aligned is not None and "location" in aligned.columns and len(f):
        loc = f["ecg_id"].map(aligned.drop_duplicates("ecg_id").set_index("ecg_id")["location"]).astype("str")
    f["score_parts"] = [json.dumps(plain({**loads_object(p), "location": l}), sort_keys=True)
                        for p, l in zip(f["score_parts"], loc)]
    f["item_id"] = _episodes(f, ex, episode_h) if len(f) else pd.Series(dtype="str")
    return f


def history_rows(folded: pd.DataFrame, run_id: str, now: pd.Timestamp) -> pd.DataFrame:
    """finding_history rows (HISTORY_COLUMNS) of a run's folded findings (fold_findings): each
    finding with its item, the run's id and the run's end."""
    out = folded.assign(run_id=run_id, run_end_at=_utc_ts(now))
    return out[HISTORY_COLUMNS].reset_index(drop=True)


def build_items(findings: pd.DataFrame, aligned: pd.DataFrame | None, existing: pd.DataFrame | None,
                run_id: str, now: pd.Timestamp, episode_h: float = EPISODE_H, *,
                explainers=None, location_weights=LOCATION_WEIGHTS, backfill: bool = False,
                folded: pd.DataFrame | None = None) -> pd.DataFrame:
    """Worklist items from a run's findings, scored; unranked (rank NA): the store ranks them
    (store.upsert_items, in the order of rank_items), and rank_items ranks them in pandas.

    findings  the findings frame of screens/ (FINDING_COLUMNS).
    aligned   the run's aligned table: the ECG's care `location` for the score, and later
              results for the explained-away hooks (EXPLAINERS). None skips both.
    existing  stored items (store.read_items) of the patients in findings AND in aligned: a finding
              within episode_h of a stored item of the same patient and screen reuses its item_id,
              and stored active items can be explained away by tonight's results. None = none.
    run_id    written on every returned item (store.upsert_items keeps the stored run_id of items
              that did not change).
    now       the run's end timestamp (tz-aware), never the clock: first_flagged_at of new items
              (unless `backfill`), last_updated_at, and the reference for recency.
    backfill  the run is a backfill (pipeline/run.py: several chunks, or more than a day): a new
              item's first_flagged_at is the acquisition time of its earliest ECG in this run,
              when the finding would have become visible to a nightly run, not the chunk's end
              (docs/prioritisation.md, "When an item was first flagged").
    folded    `findings` already through fold_findings (with the same existing and episode_h),
              so that the caller can keep them (history_rows) without folding twice.
    Returns the items that are new or changed tonight (ITEM_COLUMNS), with their score: each one
    keeps its episode's most severe ECG (tier, then severity, then the earlier ECG) and lists the
    episode's other ECGs in other_ecg_ids (JSON list). Nothing is deleted."""
    now = _utc_ts(now)
    ex = normalise_items(existing) if existing is not None and len(existing) else empty_items()
    f = fold_findings(findings, aligned, ex, episode_h) if folded is None else folded.copy()

    items = empty_items()
    if len(f):
        touched = ex[ex["item_id"].isin(f["item_id"])]
        cand_old = pd.DataFrame({"ecg_id": touched["ecg_id"], "patient_id": touched["patient_id"],
                                 "acquired_at": touched["ecg_at"], "screen": touched["screen"],
                                 "tier": touched["tier"], "score_parts": touched["score_parts"],
                                 "summary": touched["summary"], "evidence": touched["evidence"],
                                 "caveats": touched["caveats"], "territories": touched["territories"],
                                 "rule_version": touched["rule_version"], "item_id": touched["item_id"]})
        cand = pd.concat([f.assign(_old=0), cand_old.assign(_old=1)], ignore_index=True)
        cand = cand.drop_duplicates(["item_id", "ecg_id"], keep="first")   # tonight's copy wins
        cand = pd.concat([cand, severity_key(cand)[["severity"]]], axis=1)
        cand["tier"] = pd.to_numeric(cand["tier"]).astype("int64")
        cand = cand.sort_values(["item_id", "tier", "severity", "acquired_at", "ecg_id"],
                                ascending=[True, True, False, True, True], kind="mergesort")
        primary = cand.drop_duplicates("item_id").set_index("item_id")

        # The episode: all its ECGs (tonight's, the stored primary and the stored others).
        ecgs: dict[str, set] = {}
        for iid, ecg in zip(cand["item_id"].tolist(), cand["ecg_id"].astype(str).tolist()):
            ecgs.setdefault(iid, set()).add(ecg)
        for iid, others in zip(touched["item_id"], touched["other_ecg_ids"]):   # few stored items
            ecgs[iid] |= set(loads_list(others))
        prev = touched.set_index("item_id")
        start = pd.concat([cand.groupby("item_id")["acquired_at"].min(), prev["episode_start"]], axis=1).min(axis=1)
        end = pd.concat([cand.groupby("item_id")["acquired_at"].max(), prev["episode_end"]], axis=1).max(axis=1)

        items = primary.reset_index()[["item_id", "tier", "screen", "patient_id", "ecg_id", "acquired_at",
                                       "summary", "evidence", "caveats", "territories", "rule_version",
                                       "score_parts"]].rename(columns={"acquired_at": "ecg_at"})
        items = items.join(prev[["first_flagged_at", "status", "status_reason"]], on="item_id")
        # A new item was first flagged at the run's end (a nightly run shows it then); in a
        # backfill, when its earliest ECG of this run was acquired.
        seen = cand[cand["_old"].eq(0)].groupby("item_id")["acquired_at"].min() if backfill else None
        items["first_flagged_at"] = items["first_flagged_at"].fillna(
            items["item_id"].map(seen) if backfill else now)
        items["status"] = items["status"].fillna(STATUS_OPEN)
        items["rank"], items["score"] = pd.NA, np.nan
        items["run_id"], items["last_updated_at"] = run_id, now
        items["episode_start"] = items["item_id"].map(start)
        items["episode_end"] = items["item_id"].map(end)
        items["other_ecg_ids"] = [json.dumps(sorted(ecgs[i] - {e})) for i, e in zip(items["item_id"], items["ecg_id"])]
        items = normalise_items(items)
        items = apply_reopen_rule(items, ex)

    # Stored active items not touched tonight can still be explained away by tonight's results.
    idle = ex[~ex["item_id"].isin(items["item_id"]) & ex["status"].isin(ACTIVE_STATUSES)]
    pool = pd.concat([items.assign(_idle=False), idle.assign(_idle=True)], ignore_index=True) if len(idle) else items.assign(_idle=False)
    changed = apply_explainers(pool, aligned, explainers)
    woken = changed & pool["_idle"]
    pool.loc[woken, "run_id"] = run_id
    pool.loc[woken, "last_updated_at"] = now
    out = pool[~pool["_idle"] | changed].drop(columns="_idle")
    if out.empty:
        return empty_items()
    # Scored here, ranked once, in the store: store.upsert_items re-ranks the whole table in SQL
    # (store._rerank, the order of rank_items) in the transaction that writes these items, and a
    # review re-ranks it again, since closing an item moves every item below it. A rank among
    # tonight's items alone would be overwritten there and is not computed (rank stays NA).
    out = normalise_items(out)
    out["score"] = score_items(out, location_weights)
    return out
