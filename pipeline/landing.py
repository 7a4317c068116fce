"""Has a night's ECG export landed in the lake? One answer for the Airflow sensor and the CLI.

Standard library only (pathlib and datetime): the DAG's sensor pokes it every few minutes and
the CLI asks it before starting its gate worker, so it must be cheap to import and to run. It
lists folders and names; it never opens a Parquet file, so it cannot see a row.
"""
from __future__ import annotations

from datetime import date, datetime, timedelta, timezone
from pathlib import Path

from cardiosieve.pipeline.errors import BadInputError

ECG_FOLDER = "ecg"
PARTITION_PREFIX = "date="


class ExportsMissingError(BadInputError):
    """The ECG export of [start, end) is not (completely) in the lake (exit code 2)."""


def utc_instant(value: str | datetime) -> datetime:
    """A run bound as an aware UTC datetime; a bound without offset (e.g. 2026-11-29) is UTC.
    ValueError when it is not ISO 8601 (the run's own interval check words that for the user)."""
    ts = value if isinstance(value, datetime) else datetime.fromisoformat(str(value).strip())
    return ts.replace(tzinfo=timezone.utc) if ts.tzinfo is None else ts.astimezone(timezone.utc)


def interval_days(start, end) -> list[date]:
    """The UTC calendar days that the half-open [start, end) touches; [] when start >= end."""
    lo, hi = utc_instant(start), utc_instant(end)
    if not lo < hi:
        return []
    last = (hi - timedelta(microseconds=1)).date()
    return [lo.date() + timedelta(days=i) for i in range((last - lo.date()).days + 1)]


def missing_exports(lake, start, end, marker: str = "") -> list[str]:
    """Folders (relative to the lake) whose ECG export for [start, end) has not landed, [] when
    it has.

    A date-partitioned lake needs ecg/date=YYYY-MM-DD/ for every UTC day that [start, end)
    touches, holding a Parquet file (or `marker`, when given, e.g. _SUCCESS); an unpartitioned
    ecg/ folder counts as landed when it holds a Parquet file (it cannot tell one night from
    another). A partition that holds a Parquet file has landed even if the file holds no row of
    the interval: that is a missing feed, the quality gate's call (ecg_feed_present)."""
    root = Path(lake) / ECG_FOLDER
    if not root.is_dir():
        return [f"{ECG_FOLDER}/"]
    partitioned = any(p.name.startswith(PARTITION_PREFIX) for p in root.iterdir() if p.is_dir())
    if not partitioned:
        return [] if any(root.glob("*.parquet")) else [f"{ECG_FOLDER}/"]
    missing = []
    for day in interval_days(start, end):        # a handful of days, not rows
        part = root / f"{PARTITION_PREFIX}{day:%Y-%m-%d}"
        done = (part / marker).exists() if marker else part.is_dir() and any(part.rglob("*.parquet"))
        if not done:
            missing.append(f"{ECG_FOLDER}/{part.name}/" + marker)
    return missing


def check_landed(lake, start, end, marker: str = "") -> None:
    """ExportsMissingError naming what is missing (folder names only), unless it has all landed.
    Bounds that are not ISO 8601 pass here: the run's own interval check says what is wrong."""
    try:
        missing = missing_exports(lake, start, end, marker)
    except ValueError:
        return
    if missing:
        shown = ", ".join(missing[:5]) + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        raise ExportsMissingError(f"the ECG export for [{start}, {end}) has not landed in lake {lake}: "
                                  f"missing {shown}")
