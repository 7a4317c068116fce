"""Review timeliness for quality-improvement analysts: were the flagged items reviewed, and in time?

What it does
    timeliness_items    per item: first review, hours to it, target, and where it stands.
    review_timeliness   per screen, tier, rule version and month first flagged: items,
                        reviewed, reviewed late, never reviewed and overdue, never reviewed and
                        not yet due, explained away unreviewed, and the median and 90th
                        percentile of hours from first flagged to first review.
The follow-up rules over the lake are pipeline/followup.py.

Definitions (docs/audit.md gives them with a worked example)
    time to review   hours from the item's first_flagged_at to its first recorded review (the
                     earliest reviewed_at; a later review changes the outcome, not when the item
                     was first looked at).
    target           the site's [audit] review_target_h_tier_<n> for the item's tier (the tier
                     at its first review when recorded, else its current tier): a local choice.
    late             reviewed, more than the target after it was first flagged.
    overdue          not reviewed, and more than the target has passed between first flagged and
                     `as_of` (when the audit runs): an unreviewed item still within its target is
                     pending, not missed.
    explained        not reviewed and explained away by later data (status explained): counted
                     on their own, neither overdue nor pending.
Percentiles are linear interpolation between the order statistics (pandas' quantile, the
"linear" method; definition 7 of [HYNDMAN-FAN-1996]), the usual default of statistics software.

Sources
    HYNDMAN-FAN-1996  Hyndman RJ, Fan Y. Sample quantiles in statistical packages. Am Stat
                      1996;50:361-365 (docs/references.md).

Pure: frames in, a frame out; no files, no connections, no clock (the caller passes `as_of`).
Counts and hours only in review_timeliness; timeliness_items names items and patients (the
analyst's --items).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

TIMELINESS_COLUMNS = ["screen", "tier", "rule_version", "month", "items", "reviewed", "reviewed_late", "overdue",
                      "pending", "explained_unreviewed", "target_h", "median_h_to_review", "p90_h_to_review"]
# One row per item (for --items only: it names item and patient ids).
TIMELINESS_ITEM_COLUMNS = ["item_id", "patient_id", "screen", "tier", "rule_version", "month", "first_flagged_at",
                           "first_reviewed_at", "hours_to_review", "target_h", "timeliness"]
IN_TIME, LATE, OVERDUE, PENDING, EXPLAINED = "in_time", "late", "overdue", "pending", "explained_unreviewed"


def first_reviews(reviews: pd.DataFrame) -> pd.DataFrame:
    """Each item's first recorded review (REVIEW_COLUMNS of pipeline/store.py, tier_at_review
    among them), indexed by item_id."""
    if reviews.empty:
        return pd.DataFrame(columns=["reviewed_at", "tier_at_review"], index=pd.Index([], name="item_id"))
    order = ["item_id", "reviewed_at"] + (["review_id"] if "review_id" in reviews.columns else [])
    r = reviews.sort_values(order, kind="mergesort")
    return r.drop_duplicates("item_id", keep="first").set_index("item_id")


def hours_to_first_review(items: pd.DataFrame, first: pd.DataFrame) -> pd.Series:
    """Per item (items' index): hours from its first_flagged_at to its first review (`first`,
    from first_reviews); NaN for an item never reviewed. `yield` takes its median too."""
    reviewed_at = pd.to_datetime(items["item_id"].map(first["reviewed_at"]), utc=True)
    return (reviewed_at - pd.to_datetime(items["first_flagged_at"], utc=True)) / pd.Timedelta(hours=1)


def timeliness_items(items: pd.DataFrame, reviews: pd.DataFrame, targets_h: dict[int, float],
                     as_of: pd.Timestamp) -> pd.DataFrame:
    """TIMELINESS_ITEM_COLUMNS, one row per item: its first review, the hours to it, the target of
    its tier and where it stands (in_time, late, overdue, pending, explained_unreviewed). The
    tier and rule version are those at its first review where the store recorded them, else the
    item's current ones. `items` are stored items (ITEM_COLUMNS), `reviews` their reviews,
    `targets_h` tier -> hours ([audit] of the site config), `as_of` the audit's instant (UTC)."""
    if items.empty:
        return pd.DataFrame(columns=TIMELINESS_ITEM_COLUMNS)
    as_of = pd.Timestamp(as_of).tz_convert("UTC")
    first = first_reviews(reviews)
    flagged = pd.to_datetime(items["first_flagged_at"], utc=True)
    hours = hours_to_first_review(items, first)
    tier_seen = pd.to_numeric(items["item_id"].map(first["tier_at_review"]), errors="coerce")
    tier = tier_seen.fillna(items["tier"]).astype(int)
    version_now = items["rule_version"] if "rule_version" in items.columns else pd.Series("", index=items.index)
    version_seen = (items["item_id"].map(first["rule_version_at_review"])
                    if "rule_version_at_review" in first.columns else pd.Series(None, index=items.index))
    target = tier.map(targets_h).astype(float)
    is_reviewed = hours.notna()
    explained = ~is_reviewed & items["status"].eq("explained")
    waited = (as_of - flagged) / pd.Timedelta(hours=1)
    state = np.select([is_reviewed & (hours > target), is_reviewed, explained, waited > target],
                      [LATE, IN_TIME, EXPLAINED, OVERDUE], PENDING)
    return pd.DataFrame({
        "item_id": items["item_id"].astype(str),
        "patient_id": items["patient_id"].astype(str) if "patient_id" in items.columns else "",
        "screen": items["screen"].astype(str), "tier": tier,
        "rule_version": version_seen.astype(object).where(version_seen.notna(), version_now).fillna("").astype(str),
        "month": flagged.dt.strftime("%Y-%m"), "first_flagged_at": flagged,
        "first_reviewed_at": pd.to_datetime(items["item_id"].map(first["reviewed_at"]), utc=True),
        "hours_to_review": hours.where(is_reviewed), "target_h": target, "timeliness": state,
    })[TIMELINESS_ITEM_COLUMNS].reset_index(drop=True)


def review_timeliness(items: pd.DataFrame, reviews: pd.DataFrame, targets_h: dict[int, float],
                      as_of: pd.Timestamp) -> pd.DataFrame:
    """TIMELINESS_COLUMNS, one row per screen, tier, rule version and month (YYYY-MM of
    first_flagged_at in UTC) that has items (timeliness_items gives the arguments)."""
    per = timeliness_items(items, reviews, targets_h, as_of)
    if per.empty:
        return pd.DataFrame(columns=TIMELINESS_COLUMNS)
    state = per["timeliness"]
    df = per.assign(reviewed=state.isin([IN_TIME, LATE]), reviewed_late=state.eq(LATE), overdue=state.eq(OVERDUE),
                    pending=state.eq(PENDING), explained_unreviewed=state.eq(EXPLAINED))
    g = df.groupby(["screen", "tier", "rule_version", "month"], sort=True)
    out = g.agg(items=("reviewed", "size"), reviewed=("reviewed", "sum"), reviewed_late=("reviewed_late", "sum"),
                overdue=("overdue", "sum"), pending=("pending", "sum"),
                explained_unreviewed=("explained_unreviewed", "sum"), target_h=("target_h", "first"),
                median_h_to_review=("hours_to_review", "median"),
                p90_h_to_review=("hours_to_review", lambda h: h.quantile(0.9) if h.notna().any() else np.nan))
    out = out.reset_index()
    for c in ("items", "reviewed", "reviewed_late", "overdue", "pending", "explained_unreviewed"):
        out[c] = out[c].astype(int)
    return out[TIMELINESS_COLUMNS]
