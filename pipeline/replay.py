"""Threshold what-if: re-screen already aligned history under other thresholds (`cardiosieve replay`).

For quality-improvement analysts: "what would a different threshold have done?". Nothing here
writes to OUT's stages, its published files or the store: the live worklist is never touched.

What it reads (docs/replay.md)
    the aligned archive    OUT/aligned_history/<chunk>/ (pipeline/archive.py): each chunk's aligned
                           table and the leads the screens read for it. An ECG in several
                           folders (a backfill, then a rerun of a night) is taken from the folder
                           written last.
    the lake               for the parts of the period no archive folder covers: loaded, row-checked
                           (the quality gate's row decisions, without Great Expectations) and aligned
                           by the run's own stage functions into a temporary folder, chunk by chunk.
    the store              finding_history (which ECGs each live item holds), the items' reviews
                           and the recorded missed cases; read only.

What it computes
    (a) "current": the site's rules as a run applies them (run.site_rules);
    (b) "alternative": the site's rules plus the what-if file's [rules.<screen>] overrides. Only
        the screens whose rules differ are screened again for (b).
    Each set of findings is folded into would-be items by worklist.fold_findings over an empty
    store, so items are counted the same way for both. Reviewed live items count as flagged
    under a rule set when that set flags any of the item's ECGs with the item's screen.
    PPV = (finding_real + already_known) / reviewed, as `cardiosieve yield` defines it, with
    the 95 % Wilson score interval (store.wilson_interval).

The report is counts and percentages; item-level rows (ids) only when asked for (`items=True`).
Logs carry intervals, counts and seconds, never an identifier or a row value.
"""
from __future__ import annotations

import logging
import math
import tempfile
import time
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.frames import isin

log = logging.getLogger(__name__)


class ReplayError(BadInputError):
    """A replay argument cannot be used (exit 2, one line naming the argument, never a row value)."""


# Where a swept threshold may go, by its unit: plausible physical ranges, wide enough for any
# what-if a site would ask and narrow enough to catch a typing slip (5500 for 5.5 mmol/L).
# Local choices (docs/replay.md); a unit not listed here cannot be swept.
SWEEP_RANGES: dict[str, tuple[float, float]] = {
    "mmol/L": (0.0, 15.0),         # potassium, magnesium, calcium
    "ms": (0.0, 1000.0),           # intervals and their changes
    "uV": (-5000.0, 5000.0),       # amplitudes; depression cut points are negative
    "bpm": (0.0, 300.0),
    "y": (0.0, 120.0),
    "h": (0.0, 8760.0),            # up to a year
    "%": (0.0, 1000.0),
    "ng/L": (0.0, 10000.0),
    "x URL": (0.0, 100.0),
    "x cut point": (0.0, 10.0),
    "leads": (0.0, 15.0),
    "walls": (0.0, 6.0),
    "points": (0.0, 30.0),
    "ratio": (-10.0, 10.0),
    "R/|S|": (0.0, 20.0),
    "ST/|S|": (0.0, 5.0),
}
SWEEP_MAX_POINTS = 200
SWEEP_TOLERANCE = 1e-9             # relative slack for the last point of lo:hi:step

POSITIVE_OUTCOMES = ("finding_real", "already_known")        # store.TRUE_POSITIVE_OUTCOMES
NEGATIVE_OUTCOMES = ("finding_not_real", "data_problem")

# The columns of the per-screen comparison (docs/replay.md defines each).
SCREEN_COLUMNS = [
    "screen", "rules_changed", "findings_current", "findings_alternative",
    "items_current", "items_alternative", "items_change_pct",
    "items_per_day_current", "items_per_day_alternative", "ecgs_gained", "ecgs_lost",
    "reviewed", "reviewed_kept", "reviewed_lost_real", "reviewed_lost_not_real", "reviewed_gained",
    "reviewed_flagged_by_neither",
    "ppv_current", "ppv_current_low", "ppv_current_high", "ppv_alternative", "ppv_alternative_low",
    "ppv_alternative_high", "missed_cases", "missed_flagged_current", "missed_flagged_alternative",
    "live_ecgs", "live_same_tier", "live_other_tier", "live_only", "replay_only", "live_agreement_pct",
]
TIER_COLUMNS = ["screen", "tier", "findings_current", "findings_alternative", "items_current", "items_alternative"]
SWEEP_COLUMNS = ["screen", "key", "value", "unit", "findings", "items", "items_per_day", "reviewed_flagged",
                 "ppv", "ppv_low", "ppv_high"]
ITEM_ROW_COLUMNS = ["screen", "change", "would_be_item_id", "ecg_ids", "patient_id", "live_item_ids",
                    "live_outcomes"]


# ---------------------------------------------------------------------------------------------
# Arguments
# ---------------------------------------------------------------------------------------------
def read_whatif(path) -> dict[str, dict]:
    """The what-if file's overrides, {screen: {key: value}}: `[rules.<screen>]` tables in the site
    config's form (docs/configuration.md). Any other section, an unknown screen or key, or a
    value of the wrong kind is a ReplayError; so is a file that cannot be read."""
    from cardiosieve.screens.criteria import load_rules

    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ReplayError(f"replay: --rules {path}: no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ReplayError(f"replay: --rules {path}: cannot be read ({type(exc).__name__})") from None
    except tomllib.TOMLDecodeError as exc:
        raise ReplayError(f"replay: --rules {path}: not valid TOML ({exc})") from None
    other = sorted(set(raw) - {"rules"})
    if other:
        raise ReplayError(f"replay: --rules {path.name}: only [rules.<screen>] tables belong here, "
                          f"not [{other[0]}]")
    rules = raw.get("rules", {})
    if not isinstance(rules, dict) or not all(isinstance(v, dict) for v in rules.values()):
        raise ReplayError(f"replay: --rules {path.name}: [rules] must hold one [rules.<screen>] table per screen")
    try:
        load_rules(rules or None, source_name=path.name)
    except ValueError as exc:
        raise ReplayError(f"replay: --rules {path.name}: {exc}") from None
    return {screen: dict(values) for screen, values in rules.items()}


@dataclass(frozen=True)
class Sweep:
    screen: str
    key: str
    values: tuple[float, ...]
    unit: str


def parse_sweep(text: str, rules) -> Sweep:
    """`screen.key=lo:hi:step` as the values lo, lo+step, ..., hi (inclusive within tolerance);
    ReplayError for an unknown screen or threshold, a unit without an allowed range, a value
    outside it, step <= 0, lo > hi, or more than SWEEP_MAX_POINTS values."""
    name, sep, spec = text.partition("=")
    screen, dot, key = name.strip().partition(".")
    if not sep or not dot:
        raise ReplayError("replay: --sweep takes screen.key=lo:hi:step, e.g. hyperkalemia.k_mild=5.0:6.0:0.1")
    if screen not in rules.screens:
        raise ReplayError(f"replay: --sweep: unknown screen {screen!r} (known: {', '.join(rules.screens)})")
    if key not in rules[screen].thresholds:
        raise ReplayError(f"replay: --sweep: screen {screen!r} has no threshold {key!r}")
    try:
        lo, hi, step = (float(x) for x in spec.split(":"))
    except ValueError:
        raise ReplayError("replay: --sweep: the range must be lo:hi:step, three numbers") from None
    if not all(math.isfinite(x) for x in (lo, hi, step)):
        raise ReplayError("replay: --sweep: lo, hi and step must be finite numbers")
    if step <= 0:
        raise ReplayError("replay: --sweep: step must be above 0")
    if lo > hi:
        raise ReplayError("replay: --sweep: lo must not be above hi")
    unit = rules[screen][key].unit
    if unit not in SWEEP_RANGES:
        raise ReplayError(f"replay: --sweep: {screen}.{key} (unit {unit}) has no allowed sweep range")
    floor, ceiling = SWEEP_RANGES[unit]
    if lo < floor or hi > ceiling:
        raise ReplayError(f"replay: --sweep: {screen}.{key} may be swept within {floor:g} to {ceiling:g} {unit}")
    n = int(math.floor((hi - lo) / step * (1 + SWEEP_TOLERANCE) + SWEEP_TOLERANCE)) + 1
    if n > SWEEP_MAX_POINTS:
        raise ReplayError(f"replay: --sweep: {n} values; at most {SWEEP_MAX_POINTS}")
    values = tuple(round(lo + i * step, 12) for i in range(n))
    return Sweep(screen, key, values, unit)


def alternative_settings(settings, overrides: dict[str, dict], label: str):
    """The site's settings with the what-if overrides laid over its own [rules.*] (key by key)."""
    merged = {screen: dict(values) for screen, values in (settings.rules or {}).items()}
    for screen, values in overrides.items():
        merged.setdefault(screen, {}).update(values)
    return replace(settings, rules=merged, source=f"{settings.source} + {label}")


def rules_differ(a, b) -> bool:
    """Whether two ScreenRules apply different thresholds (operator or value) or settings."""
    ta = {k: (t.op, t.value) for k, t in a.thresholds.items()}
    tb = {k: (t.op, t.value) for k, t in b.thresholds.items()}
    return ta != tb or dict(a.settings) != dict(b.settings)


# ---------------------------------------------------------------------------------------------
# The period's aligned ECGs and leads
# ---------------------------------------------------------------------------------------------
@dataclass
class Period:
    """The aligned ECGs acquired in [lo, hi) and the leads the screens read for them."""
    lo: pd.Timestamp
    hi: pd.Timestamp
    aligned: pd.DataFrame
    leads: pd.DataFrame
    archived_ecgs: int = 0
    realigned_ecgs: int = 0
    archive_folders: int = 0
    uncovered: list[tuple[pd.Timestamp, pd.Timestamp]] = field(default_factory=list)
    gate_stopped_chunks: int = 0

    @property
    def days(self) -> float:
        return (self.hi - self.lo) / pd.Timedelta(days=1)


def uncovered_parts(lo, hi, covered: list[tuple[pd.Timestamp, pd.Timestamp]]) -> list[tuple]:
    """[lo, hi) minus the union of the `covered` intervals, as sorted half-open intervals."""
    gaps, t = [], lo
    for a, b in sorted(covered):
        if b <= t or a >= hi:
            continue
        if a > t:
            gaps.append((t, min(a, hi)))
        t = max(t, b)
        if t >= hi:
            break
    if t < hi:
        gaps.append((t, hi))
    return gaps


def _latest_copies(parts: list[tuple[pd.DataFrame, pd.DataFrame]]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One aligned row per ECG (from the last part holding it: parts are in the order written)
    and, for each ECG and each chosen prior ECG, the lead rows of the part its aligned row came from."""
    from cardiosieve.pipeline import contract as c
    from cardiosieve.pipeline.normalise import empty_table

    if not parts:
        return pd.DataFrame(columns=["ecg_id", "patient_id", "acquired_at", "prior_ecg_id"]), empty_table(c.ECG_LEAD)
    aligned = pd.concat([a.assign(_part=k) for k, (a, _) in enumerate(parts)], ignore_index=True)
    aligned = aligned.drop_duplicates("ecg_id", keep="last")
    need = pd.concat([aligned[["ecg_id", "_part"]],
                      aligned[["prior_ecg_id", "_part"]].dropna().rename(columns={"prior_ecg_id": "ecg_id"})],
                     ignore_index=True).drop_duplicates()
    leads = pd.concat([l.assign(_part=k) for k, (_, l) in enumerate(parts)], ignore_index=True)
    leads = leads.merge(need, on=["ecg_id", "_part"], how="inner")
    # A prior ECG read for two parts: the later part's copy, whole (never rows of both).
    last = leads.groupby("ecg_id")["_part"].transform("max")
    leads = leads[leads["_part"].eq(last)]
    return (aligned.sort_values(["acquired_at", "ecg_id"], kind="mergesort").drop(columns="_part").reset_index(drop=True),
            leads.drop(columns="_part").reset_index(drop=True))


def read_period(out, lake, lo: pd.Timestamp, hi: pd.Timestamp, settings) -> Period:
    """The period's aligned ECGs and leads: from the archive where a folder covers the time, from
    the lake (load, row checks, align, in a temporary folder) for the rest."""
    from cardiosieve.pipeline.archive import ARCHIVE_ALIGNED, ARCHIVE_LEADS, archive_folders

    folders = [f for f in archive_folders(out) if f["lo"] < hi and f["hi"] > lo]
    parts = []
    for f in folders:
        a = pd.read_parquet(f["path"] / ARCHIVE_ALIGNED)
        a = a[(a["acquired_at"] >= lo) & (a["acquired_at"] < hi)]
        if a.empty:
            continue
        wanted = pd.concat([a["ecg_id"], a["prior_ecg_id"].dropna()], ignore_index=True)
        leads = pd.read_parquet(f["path"] / ARCHIVE_LEADS)
        parts.append((a, leads[isin(leads["ecg_id"], wanted)]))
    archived = sum(len(a) for a, _ in parts)
    gaps = uncovered_parts(lo, hi, [(f["lo"], f["hi"]) for f in folders])
    realigned, stopped = [], 0
    if gaps:
        realigned, stopped = _realign(lake, gaps, settings)
    aligned, leads = _latest_copies(parts + realigned)
    return Period(lo, hi, aligned, leads, archived_ecgs=archived, realigned_ecgs=sum(len(a) for a, _ in realigned),
                  archive_folders=len(folders), uncovered=gaps, gate_stopped_chunks=stopped)


def _realign(lake, gaps, settings) -> tuple[list[tuple[pd.DataFrame, pd.DataFrame]], int]:
    """Load, row-check and align each gap, in chunks as a backfill would (run.chunk_bounds), into a
    temporary folder that is removed afterwards. A chunk the row checks alone would stop is left
    out (the live run would not have screened it either) and counted."""
    from cardiosieve.pipeline import run

    if lake is None:
        raise ReplayError("replay: part of the period is not in the aligned archive; give --lake")
    parts, stopped = [], 0
    with tempfile.TemporaryDirectory(prefix="cardiosieve-replay-") as tmp:
        for a, b in gaps:
            bounds = run.chunk_bounds(lake, a, b)
            for x, y in zip(bounds[:-1], bounds[1:]):
                loaded = run.stage_load(lake, tmp, x, y, settings=settings)
                if loaded["tables"]["ecg"]["accepted"] == 0:
                    continue
                if not run.stage_row_checks(lake, tmp, x, y, settings=settings)["passed"]:
                    stopped += 1
                    continue
                run.stage_align(tmp, x, y, settings=settings, lake=lake)
                d = run.stage_dir(tmp, x, y)
                parts.append((pd.read_parquet(d / "aligned.parquet"), run.screen_leads(d)))
    return parts, stopped


# ---------------------------------------------------------------------------------------------
# Screening and folding
# ---------------------------------------------------------------------------------------------
def screen_period(period: Period, rules, screens) -> pd.DataFrame:
    """The findings (FINDING_COLUMNS) of the named screens over the period, under `rules`."""
    from cardiosieve.screens import FINDING_COLUMNS, SCREENS, empty_findings

    if period.aligned.empty:
        return empty_findings()
    parts = [SCREENS[name](period.aligned, period.leads, rules) for name in screens]
    parts = [p for p in parts if len(p)]
    return pd.concat(parts, ignore_index=True)[FINDING_COLUMNS] if parts else empty_findings()


def would_be_items(findings: pd.DataFrame, aligned: pd.DataFrame, episode_h: float) -> pd.DataFrame:
    """Each finding with the would-be item it folds into over an empty store
    (worklist.fold_findings): ecg_id, patient_id, screen, tier, acquired_at, item_id."""
    from cardiosieve.pipeline.worklist import fold_findings

    cols = ["ecg_id", "patient_id", "screen", "tier", "acquired_at", "item_id"]
    if findings.empty:
        return pd.DataFrame({c: pd.Series(dtype="int64" if c == "tier" else "str") for c in cols})
    folded = fold_findings(findings, aligned, None, episode_h)
    return folded[cols].reset_index(drop=True)


# ---------------------------------------------------------------------------------------------
# The live store
# ---------------------------------------------------------------------------------------------
@dataclass
class Live:
    history: pd.DataFrame        # finding_history of the period's ECGs: item_id, screen, ecg_id, tier, ...
    latest: pd.DataFrame         # the latest live finding per (ecg_id, screen)
    reviewed: pd.DataFrame       # reviewed items: item_id, screen, outcome (the latest review's)
    missed: pd.DataFrame         # missed cases: ecg_id, screen


def read_live(engine, lo, hi) -> Live:
    from cardiosieve.pipeline.store import read_finding_history, read_missed_cases, read_reviews

    history = read_finding_history(engine, lo, hi)
    latest = history.drop_duplicates(["ecg_id", "screen"], keep="last")          # appended in order
    items = history.drop_duplicates("item_id")[["item_id", "screen"]]
    reviews = read_reviews(engine, items["item_id"])
    last = reviews.drop_duplicates("item_id", keep="last")[["item_id", "outcome"]]   # oldest first
    reviewed = items.merge(last, on="item_id", how="inner")
    return Live(history, latest, reviewed, read_missed_cases(engine)[["ecg_id", "screen", "patient_id"]])


def flagged_items(live: Live, findings: pd.DataFrame) -> pd.Series:
    """Per reviewed live item (indexed by item_id): whether `findings` flag any of its ECGs with
    the item's screen."""
    pairs = live.history[["item_id", "screen", "ecg_id"]].drop_duplicates()
    hit = pairs.merge(findings[["screen", "ecg_id"]].drop_duplicates().assign(_hit=True),
                      on=["screen", "ecg_id"], how="left")
    by_item = hit["_hit"].fillna(False).astype(bool).groupby(hit["item_id"]).any()
    return by_item.reindex(live.reviewed["item_id"]).fillna(False).astype(bool)


def _ppv(reviewed: pd.DataFrame, mask: pd.Series) -> tuple[float, float, float, int]:
    from cardiosieve.pipeline.store import wilson_interval

    sub = reviewed[mask.to_numpy()]
    n = len(sub)
    k = int(sub["outcome"].isin(POSITIVE_OUTCOMES).sum())
    if n == 0:
        return math.nan, math.nan, math.nan, 0
    low, high = wilson_interval(k, n)
    return k / n, float(low), float(high), n


def _pct(part: float, whole: float) -> float:
    return round(100.0 * part / whole, 1) if whole else math.nan


# ---------------------------------------------------------------------------------------------
# The report
# ---------------------------------------------------------------------------------------------
@dataclass
class Report:
    period: Period
    screens: pd.DataFrame
    tiers: pd.DataFrame
    sweep: pd.DataFrame | None = None
    items: pd.DataFrame | None = None
    changed_screens: list[str] = field(default_factory=list)
    overrides: dict = field(default_factory=dict)
    seconds: float = 0.0

    def header(self) -> dict:
        p = self.period
        return {"period": [p.lo.isoformat(), p.hi.isoformat()], "days": p.days,
                "ecgs": int(len(p.aligned)), "ecgs_from_archive": p.archived_ecgs,
                "ecgs_realigned": p.realigned_ecgs, "archive_folders": p.archive_folders,
                "uncovered_intervals": [[a.isoformat(), b.isoformat()] for a, b in p.uncovered],
                "realigned_chunks_stopped_by_row_checks": p.gate_stopped_chunks,
                "overrides": self.overrides, "screens_rescreened": self.changed_screens}


def compare(period: Period, live: Live, current, alternative, episode_h: float, *,
            with_items: bool = False) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame | None, list[str]]:
    """The per-screen and per-tier comparison of (a) `current` and (b) `alternative` over the
    period, against the live store (module docstring); and the item rows when asked."""
    from cardiosieve.screens import SCREENS

    names = list(SCREENS)
    changed = [n for n in names if rules_differ(current[n], alternative[n])]
    found_a = screen_period(period, current, names)
    found_b = pd.concat([found_a[~found_a["screen"].isin(changed)], screen_period(period, alternative, changed)],
                        ignore_index=True)
    fold_a = would_be_items(found_a, period.aligned, episode_h)
    fold_b = would_be_items(found_b, period.aligned, episode_h)
    flag_a, flag_b = flagged_items(live, found_a), flagged_items(live, found_b)
    replayed = set(period.aligned["ecg_id"].astype(str))
    missed = live.missed[isin(live.missed["ecg_id"], list(replayed))] if len(live.missed) else live.missed

    rows = []
    for name in names:
        fa, fb = fold_a[fold_a["screen"].eq(name)], fold_b[fold_b["screen"].eq(name)]
        ea, eb = set(fa["ecg_id"]), set(fb["ecg_id"])
        mine = live.reviewed["screen"].eq(name).to_numpy()
        a, b = flag_a.to_numpy() & mine, flag_b.to_numpy() & mine
        outcome = live.reviewed["outcome"].to_numpy()
        lost = a & ~b
        ppv_a, ppv_b = _ppv(live.reviewed, pd.Series(a)), _ppv(live.reviewed, pd.Series(b))
        ms = missed[missed["screen"].eq(name)] if len(missed) else missed
        ms_ids = set(ms["ecg_id"]) if len(ms) else set()
        lv = live.latest[live.latest["screen"].eq(name)][["ecg_id", "tier"]]
        rp = fa.sort_values("tier").drop_duplicates("ecg_id")[["ecg_id", "tier"]]
        both = lv.merge(rp, on="ecg_id", how="outer", suffixes=("_live", "_replay"), indicator=True)
        same = int(((both["_merge"] == "both") & (both["tier_live"] == both["tier_replay"])).sum())
        other = int(((both["_merge"] == "both") & (both["tier_live"] != both["tier_replay"])).sum())
        ia, ib = fa["item_id"].nunique(), fb["item_id"].nunique()
        rows.append({
            "screen": name, "rules_changed": name in changed,
            "findings_current": len(fa), "findings_alternative": len(fb),
            "items_current": ia, "items_alternative": ib, "items_change_pct": _pct(ib - ia, ia),
            "items_per_day_current": ia / period.days, "items_per_day_alternative": ib / period.days,
            "ecgs_gained": len(eb - ea), "ecgs_lost": len(ea - eb),
            "reviewed": int(mine.sum()), "reviewed_kept": int((a & b).sum()),
            "reviewed_lost_real": int((lost & np.isin(outcome, POSITIVE_OUTCOMES)).sum()),
            "reviewed_lost_not_real": int((lost & np.isin(outcome, NEGATIVE_OUTCOMES)).sum()),
            "reviewed_gained": int((b & ~a).sum()), "reviewed_flagged_by_neither": int((mine & ~a & ~b).sum()),
            "ppv_current": ppv_a[0], "ppv_current_low": ppv_a[1], "ppv_current_high": ppv_a[2],
            "ppv_alternative": ppv_b[0], "ppv_alternative_low": ppv_b[1], "ppv_alternative_high": ppv_b[2],
            "missed_cases": len(ms_ids), "missed_flagged_current": len(ms_ids & ea),
            "missed_flagged_alternative": len(ms_ids & eb),
            "live_ecgs": len(lv), "live_same_tier": same, "live_other_tier": other,
            "live_only": int((both["_merge"] == "left_only").sum()),
            "replay_only": int((both["_merge"] == "right_only").sum()),
            "live_agreement_pct": _pct(same, len(both)),
        })
    screens = pd.DataFrame(rows, columns=SCREEN_COLUMNS)
    tiers = _tier_table(fold_a, fold_b, names)
    items = _item_rows(fold_a, fold_b, live) if with_items else None
    return screens, tiers, items, changed


def _tier_table(fold_a: pd.DataFrame, fold_b: pd.DataFrame, names) -> pd.DataFrame:
    """Per screen and tier: findings and would-be items (an item's tier: its most severe finding's)."""
    def counts(fold, suffix):
        item_tier = fold.groupby("item_id")["tier"].transform("min")
        f = fold.groupby(["screen", "tier"]).size().rename(f"findings_{suffix}")
        i = fold.assign(_it=item_tier).drop_duplicates("item_id").groupby(["screen", "_it"]).size()
        i.index = i.index.set_names(["screen", "tier"])
        return pd.concat([f, i.rename(f"items_{suffix}")], axis=1)

    grid = pd.MultiIndex.from_product([names, [1, 2, 3, 4]], names=["screen", "tier"])
    table = pd.concat([counts(fold_a, "current"), counts(fold_b, "alternative")], axis=1).reindex(grid)
    return table.fillna(0).astype("int64").reset_index()[TIER_COLUMNS]


def _item_rows(fold_a: pd.DataFrame, fold_b: pd.DataFrame, live: Live) -> pd.DataFrame:
    """Would-be items holding ECGs flagged under one rule set only: `gained` (the alternative's
    items with ECGs the current rules do not flag) and `lost` (the other way), with the live items
    those ECGs are in and their latest outcomes. Identifies patients: only with --items."""
    live_item = live.history[["ecg_id", "screen", "item_id"]].drop_duplicates()
    outcome = live.reviewed.set_index("item_id")["outcome"]
    parts = []
    for change, mine, other in (("gained", fold_b, fold_a), ("lost", fold_a, fold_b)):
        key = mine["screen"] + "\x1f" + mine["ecg_id"]
        only = mine[~isin(key, other["screen"] + "\x1f" + other["ecg_id"])]
        if only.empty:
            continue
        m = only.merge(live_item, on=["ecg_id", "screen"], how="left", suffixes=("", "_live"))
        m["live_outcome"] = m["item_id_live"].map(outcome)
        g = m.groupby(["screen", "item_id"], sort=True)
        parts.append(pd.DataFrame({
            "change": change,
            "ecg_ids": g["ecg_id"].agg(lambda s: ",".join(sorted(set(s)))),
            "patient_id": g["patient_id"].first(),
            "live_item_ids": g["item_id_live"].agg(lambda s: ",".join(sorted(set(s.dropna())))),
            "live_outcomes": g["live_outcome"].agg(lambda s: ",".join(sorted(set(s.dropna())))),
        }).reset_index().rename(columns={"item_id": "would_be_item_id"}))
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype="str") for c in ITEM_ROW_COLUMNS})
    return pd.concat(parts, ignore_index=True)[ITEM_ROW_COLUMNS]


def sweep_table(period: Period, live: Live, settings, base_overrides: dict, sweep: Sweep, label: str,
                episode_h: float) -> pd.DataFrame:
    """One row per swept value: the screen alone re-screened with the threshold at that value (over
    the site's rules and the what-if's overrides): findings, would-be items, items per day,
    reviewed live items it flags and their PPV with the 95 % Wilson interval."""
    from cardiosieve.pipeline.run import site_rules

    rows = []
    for value in sweep.values:
        over = {**{s: dict(v) for s, v in base_overrides.items()}}
        over.setdefault(sweep.screen, {})[sweep.key] = value
        rules = site_rules(alternative_settings(settings, over, label))
        found = screen_period(period, rules, [sweep.screen])
        fold = would_be_items(found, period.aligned, episode_h)
        mask = flagged_items(live, found).to_numpy() & live.reviewed["screen"].eq(sweep.screen).to_numpy()
        ppv, low, high, n = _ppv(live.reviewed, pd.Series(mask))
        items = fold["item_id"].nunique()
        rows.append({"screen": sweep.screen, "key": sweep.key, "value": value, "unit": sweep.unit,
                     "findings": len(fold), "items": items, "items_per_day": items / period.days,
                     "reviewed_flagged": n, "ppv": ppv, "ppv_low": low, "ppv_high": high})
    return pd.DataFrame(rows, columns=SWEEP_COLUMNS)


def replay(out, lake, since, until, settings, overrides: dict, label: str, engine, *,
           sweep: Sweep | None = None, with_items: bool = False) -> Report:
    """The whole replay of [since, until) (module docstring)."""
    from cardiosieve.pipeline.run import site_rules

    t0 = time.perf_counter()
    current = site_rules(settings)
    alternative = site_rules(alternative_settings(settings, overrides, label))
    period = read_period(out, lake, since, until, settings)
    log.info("replay [%s, %s): %d ECGs (%d from the archive, %d re-aligned) in %.1f s", since.isoformat(),
             until.isoformat(), len(period.aligned), period.archived_ecgs, period.realigned_ecgs,
             time.perf_counter() - t0)
    live = read_live(engine, since, until)
    episode_h = float(settings.windows["episode_h"])
    screens, tiers, items, changed = compare(period, live, current, alternative, episode_h, with_items=with_items)
    table = sweep_table(period, live, settings, overrides, sweep, label, episode_h) if sweep else None
    seconds = time.perf_counter() - t0
    log.info("replay: screened and compared in %.1f s", seconds)
    return Report(period, screens, tiers, table, items, changed, overrides, seconds)
