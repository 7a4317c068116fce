"""Worklist items as a person reads them: `cardiosieve show` in text, JSON or CSV.

What it does
    dress          stored items + what a reviewer wants beside them, read off each item's own
                   record: sex and age (evidence values), care location (score_parts)
    select_items   the filters of `show`: screen, tier, status (at_location: care location)
    format_list    the ranked head as text blocks: one header line, the patient line, the whole
                   summary wrapped, each caveat
    format_item    one item in full: criteria with thresholds and sources, values, prior ECG,
                   episode, score parts, recorded reviews
    as_records     JSON-ready dicts (JSON texts parsed, times ISO 8601 with the offset)
    csv_frame      the flat table `show --format csv` writes (made spreadsheet-safe by the command,
                   store.spreadsheet_safe_frame, as `export` is)

Times are shown in the site's time zone (`[site] timezone` of the site configuration, or
`--timezone`), with their UTC offset, so that "02:10 +01:00" cannot be misread; the store keeps
UTC. Unknown values are written "unknown", never left blank: a blank reads like "none".
Everything here is pure: no files, no connections, no clock.
"""
from __future__ import annotations

import textwrap
from zoneinfo import ZoneInfo

import pandas as pd

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.jsontext import loads_list, loads_object, plain
from cardiosieve.pipeline.worklist import STATUS_CLOSED, TIMESTAMP_COLUMNS

UNKNOWN = "unknown"
TIME_FORMAT = "%Y-%m-%d %H:%M %z"    # then a colon in the offset: +01:00
# Fields of an item in the order the JSON output gives them (then `reviews` for one item).
RECORD_FIELDS = ["item_id", "rank", "tier", "screen", "status", "status_reason", "patient_id", "sex", "age_years",
                 "location", "ecg_id", "ecg_at", "score", "summary", "caveats", "territories", "rule_version",
                 "evidence", "score_parts", "episode_start", "episode_end", "other_ecg_ids", "first_flagged_at",
                 "last_updated_at", "run_id"]
CSV_FIELDS = ["rank", "tier", "screen", "status", "item_id", "patient_id", "sex", "age_years", "location", "ecg_id",
              "ecg_at", "score", "summary", "caveats", "rule_version", "first_flagged_at"]
CAVEAT_JOIN = " | "          # caveats in one CSV cell
JSON_LISTS = ("caveats", "other_ecg_ids")


def _territories(text) -> list[str]:
    return [t.strip() for t in text.split(",") if t.strip()] if isinstance(text, str) else []


def dress(items: pd.DataFrame) -> pd.DataFrame:
    """`items` plus sex ("F", "M" or None), age_years (float, NaN unknown) and location (text or
    None), read off each item's evidence and score parts. One JSON parse per item shown or
    filtered: the store's items, not the night's rows."""
    out = items.copy()
    values = [loads_object(t).get("values", {}) for t in out["evidence"]]
    parts = [loads_object(t) for t in out["score_parts"]]
    out["sex"] = [v.get("sex") if v.get("sex") in ("F", "M") else None for v in values]
    out["age_years"] = pd.to_numeric(pd.Series([v.get("age_years") for v in values], index=out.index, dtype=object),
                                     errors="coerce").astype(float)
    out["location"] = [p.get("location") if isinstance(p.get("location"), str) and p.get("location").strip() else None
                       for p in parts]
    return out


def select_items(items: pd.DataFrame, screens=None, tiers=None, statuses=None,
                 include_closed: bool = False) -> pd.DataFrame:
    """The items `show` lists, in the order given (read_items: rank order). Without `statuses`,
    every item but the closed ones (unless include_closed)."""
    keep = pd.Series(True, index=items.index)
    if screens:
        keep &= items["screen"].isin(list(screens))
    if tiers:
        keep &= items["tier"].isin([int(t) for t in tiers])
    if statuses:
        keep &= items["status"].isin(list(statuses))
    elif not include_closed:
        keep &= items["status"].ne(STATUS_CLOSED)
    return items[keep]


def at_location(items: pd.DataFrame, text: str | None) -> pd.DataFrame:
    """Dressed items whose care location contains `text`, case-insensitively (all when no text;
    an item whose location is unknown never matches)."""
    if not text:
        return items
    return items[items["location"].astype("str").str.contains(text, case=False, regex=False, na=False)]


def local_times(s: pd.Series, tz: str) -> pd.Series:
    """UTC timestamps as text in `tz` with the offset ("2026-11-29 14:03 +00:00"); "unknown" for NaT."""
    t = pd.to_datetime(s, utc=True).dt.tz_convert(ZoneInfo(tz))
    text = t.dt.strftime(TIME_FORMAT).str.replace(r"([+-]\d\d)(\d\d)$", r"\1:\2", regex=True)
    return text.fillna(UNKNOWN)


def _local(t, tz: str) -> str:
    return local_times(pd.Series([t]), tz).iloc[0]


def _sex_age(sex, age) -> str:
    sex_txt = {"F": "female", "M": "male"}.get(sex, "sex unknown")
    age_txt = f"{int(age)} y" if age == age and age is not None else "age unknown"
    return f"{sex_txt}, {age_txt}"


def _wrap(text: str, width: int, indent: str, first: str | None = None) -> list[str]:
    first = indent if first is None else first
    return textwrap.wrap(str(text), width=width, initial_indent=first, subsequent_indent=indent,
                         break_long_words=False, break_on_hyphens=False) or [first.rstrip()]


def _header(r) -> str:
    rank = "-" if pd.isna(r.rank) else f"#{int(r.rank)}"
    return f"{rank}  tier {int(r.tier)}  {r.screen}  {r.status}  score {r.score:.3f}  {r.item_id}"


def _patient_line(r, tz: str) -> str:
    location = f"location {r.location}" if isinstance(r.location, str) else "location unknown"
    return (f"patient {r.patient_id}  {_sex_age(r.sex, r.age_years)}  {location}  "
            f"ECG {r.ecg_id} at {_local(r.ecg_at, tz)}")


def format_list(items: pd.DataFrame, tz: str, width: int = 100) -> str:
    """The ranked head as text: per item a header (rank, tier, screen, status, score, item id),
    the patient line, the whole summary wrapped, then each caveat. `items` come from dress()."""
    lines = []
    pad = "    "
    for r in items.itertuples():   # the items shown: a --limit, not the night
        lines.append(_header(r))
        lines.append(pad + _patient_line(r, tz))
        lines += _wrap(r.summary if isinstance(r.summary, str) else UNKNOWN, width, pad)
        for caveat in loads_list(r.caveats):
            lines += _wrap(caveat, width, pad + "         ", first=pad + "caveat:  ")
        lines.append("")
    return "\n".join(lines)


def _value_text(value) -> str:
    if value is None:
        return UNKNOWN
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, dict):
        return ", ".join(f"{k} {_value_text(v)}" for k, v in value.items()) or "none"
    if isinstance(value, list):
        return ", ".join(_value_text(v) for v in value) or "none"
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def format_item(item: pd.Series, reviews: pd.DataFrame, tz: str, width: int = 100) -> str:
    """One item in full, for a person checking it by hand: what was flagged, on which values,
    against which thresholds from which sources (keys listed in docs/references.md)."""
    r = next(pd.DataFrame([item]).itertuples())   # attribute access as in format_list (a Series has .rank())
    evidence = loads_object(item["evidence"])
    pad = "    "
    lines = [CAUTION, "", _header(r), pad + _patient_line(r, tz), ""]
    lines.append("summary")
    lines += _wrap(item["summary"] if isinstance(item["summary"], str) else UNKNOWN, width, pad)
    caveats = loads_list(item["caveats"])
    lines.append("caveats" + ("" if caveats else ": none"))
    for caveat in caveats:
        lines += _wrap(caveat, width, pad + "  ", first=pad + "- ")
    rules = evidence.get("rules", [])
    lines.append("criteria met (threshold, source)" + ("" if rules else ": none recorded"))
    for rule in rules:
        lines.append(f"{pad}{rule.get('key', UNKNOWN):<24} {rule.get('op', '')} {_value_text(rule.get('value'))} "
                     f"{rule.get('unit', '')}  [{rule.get('source', UNKNOWN)}]")
    values = evidence.get("values", {})
    lines.append("values (null = unknown)")
    for key, value in values.items():
        lines += _wrap(_value_text(value), width, pad + " " * 25, first=f"{pad}{key:<24} ")
    for key, value in evidence.items():            # screen-specific blocks (signs, scores)
        if key in ("values", "rules", "rule_version"):
            continue
        lines.append(key)
        block = value if isinstance(value, dict) else {"": value}
        for k, v in block.items():
            lines += _wrap(_value_text(v), width, pad + " " * 25, first=f"{pad}{k:<24} ")
    prior = values.get("prior_ecg_id")
    gap = values.get("prior_gap_h")
    lines.append("prior ECG: " + (UNKNOWN if prior is None else str(prior) +
                                  (f", {gap:.1f} h before" if isinstance(gap, (int, float)) else "")))
    others = loads_list(item["other_ecg_ids"])
    lines.append(f"episode: {_local(item['episode_start'], tz)} to {_local(item['episode_end'], tz)}; "
                 f"other ECGs folded in: {', '.join(map(str, others)) or 'none'}")
    lines.append(f"flagged first {_local(item['first_flagged_at'], tz)}, updated {_local(item['last_updated_at'], tz)}, "
                 f"rule {item['rule_version']}, run {item['run_id']}")
    if isinstance(item["status_reason"], str) and item["status_reason"]:
        lines.append(f"status reason: {item['status_reason']}")
    lines.append("score parts: " + _value_text(loads_object(item["score_parts"])))
    lines.append("reviews" + ("" if len(reviews) else ": none recorded"))
    for v in reviews.itertuples():
        note = f": {v.note}" if isinstance(v.note, str) and v.note else ""
        lines += _wrap(f"{_local(v.reviewed_at, tz)}  {v.outcome}  by {v.reviewer_role} ({v.recorded_via}){note}",
                       width, pad + "  ", first=pad)
    lines.append("Sources are keys of docs/references.md; rules not met are not listed.")
    return "\n".join(lines)


def as_records(items: pd.DataFrame, tz: str) -> list[dict]:
    """JSON-ready dicts, RECORD_FIELDS in order: evidence and score_parts as objects, caveats,
    territories and other ECG ids as lists, times ISO 8601 in `tz` with the offset."""
    df = items.copy()
    for c in TIMESTAMP_COLUMNS:
        df[c] = pd.to_datetime(df[c], utc=True).dt.tz_convert(ZoneInfo(tz))
    records = []
    for r in df.to_dict("records"):   # the items asked for, not the night
        r["evidence"] = loads_object(r["evidence"])
        r["score_parts"] = loads_object(r["score_parts"])
        for c in JSON_LISTS:
            r[c] = loads_list(r[c])
        r["territories"] = _territories(r["territories"])
        records.append({k: plain(r.get(k)) for k in RECORD_FIELDS})
    return records


def csv_frame(items: pd.DataFrame, tz: str) -> pd.DataFrame:
    """The flat table of `show --format csv`: CSV_FIELDS, caveats joined by " | ", times in `tz`
    with the offset, the caution in a last column of every row."""
    df = items[[c for c in CSV_FIELDS if c in items.columns]].copy()
    df["caveats"] = [CAVEAT_JOIN.join(map(str, loads_list(t))) for t in items["caveats"]]
    df["age_years"] = items["age_years"].round().astype("Int64")
    for c in ("ecg_at", "first_flagged_at"):
        df[c] = local_times(items[c], tz)
    df["caution"] = CAUTION
    return df
