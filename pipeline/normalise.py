"""Turn one table's raw rows into contract rows, rejecting what cannot be trusted.

Pure functions over DataFrames (no I/O). `normalise_table` renames site columns, parses each
column by its contract kind, converts units, and checks impossible values and duplicate keys.
Every input row comes out exactly once: either in `clean` or in `rejects` with the first problem
found (reason code, column, and a short detail that never copies the row's values).
"""
from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.config import Settings
from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.frames import isin


class ContractError(BadInputError):
    """A whole table breaks the contract (e.g. a required column is missing)."""


_OFFSET_RE = r"(?:Z|[+-]\d{2}(?::?\d{2})?)$"
_TRUE = {"true", "t", "1", "yes", "y"}
_FALSE = {"false", "f", "0", "no", "n"}
FILE_COLUMN = "__file"   # the loader's record of which file each row came from


PLACED_COLUMNS = ["result_id", "patient_id", "collected_at", "analyte", "reason"]


@dataclass
class Normalised:
    clean: pd.DataFrame
    rejects: pd.DataFrame
    placed: pd.DataFrame | None = None   # lab only: rejected rows whose patient and time could be read


class _Problems:
    """First problem per row: reason code, column and detail, filled mask by mask."""

    def __init__(self, n: int):
        self.reason = np.full(n, None, dtype=object)
        self.column = np.full(n, None, dtype=object)
        self.detail = np.full(n, None, dtype=object)

    def flag(self, mask, reason: str, column: str, detail: str) -> None:
        mask = np.asarray(mask, dtype=bool) & pd.isna(self.reason)
        self.reason[mask] = reason
        self.column[mask] = column
        self.detail[mask] = detail

    @property
    def ok(self) -> np.ndarray:
        return pd.isna(self.reason)


def normalise_table(raw: pd.DataFrame, table: c.Table, settings: Settings, scope: str = "night",
                    source: str = "", window: tuple[pd.Timestamp, pd.Timestamp] | None = None,
                    keep: dict[str, object] | None = None,
                    partition_dates: tuple[str, str] | None = None,
                    partitions: dict[str, str | None] | None = None) -> Normalised:
    """Contract rows of `table` from `raw` (one schema group of files, site names as exported).

    `window` ([lo, hi) on the table's time column) and `keep` (column -> allowed values) say
    what is in scope: rows whose valid value falls outside are not this run's input and leave
    without a trace. Two kinds of row belong to their file's partition rather than to a window:
    a row whose time cannot be read, and a row timed more than the table's
    `partition_slack_days` outside the date of its `date=` folder (outside_partition; never
    clean, in any read). Both are rejected, counted only by a read whose dates [first, last]
    (`partition_dates`) hold their partition, and out of scope of every other read.
    `partitions` maps each file (the FILE_COLUMN) to its partition date, None for a file outside
    any `date=` folder (such rows have no partition: every read counts them). `clean` keeps the
    FILE_COLUMN so that `reject_duplicates` can run over all files together."""
    df = raw.rename(columns=settings.columns.get(table.name, {}))
    missing = [col.name for col in table.columns if col.required and col.name not in df.columns]
    if missing:
        raise ContractError(f"table {table.name}: {source or 'input'} lacks required column(s) {missing}")
    df = df.reset_index(drop=True)
    problems = _Problems(len(df))
    out = {}
    for col in table.columns:
        if col.name not in df.columns:
            out[col.name] = _empty(col.kind, len(df))
            continue
        out[col.name] = _parse(df[col.name], col, settings, problems)
    frame = pd.DataFrame(out)
    if FILE_COLUMN in df.columns:
        frame[FILE_COLUMN] = df[FILE_COLUMN].astype("category")   # a few files for many rows
    else:
        frame[FILE_COLUMN] = source

    if table is c.LAB and settings.lab_codes:
        frame["analyte"] = frame["analyte"].replace(settings.lab_codes)
    own, misfiled = _partition_rows(frame, table, partitions, partition_dates)
    if misfiled.any():
        problems.flag(misfiled, c.OUTSIDE_PARTITION, table.time_column,
                      f"more than {table.partition_slack_days} day(s) outside the date of its date= folder")
    in_scope = _in_scope(frame, table, window, keep, own, misfiled)
    _convert_units(frame, table, settings, problems)
    _check_bounds(frame, table, problems)
    if table is c.ECG_LEAD:
        problems.flag(~frame["lead"].isin(c.ALL_LEADS) & frame["lead"].notna(), c.UNKNOWN_LEAD, "lead",
                      "lead name outside the contract's list")
    if table is c.PATIENT:
        problems.flag(frame["sex"].notna() & ~frame["sex"].isin(c.SEXES), c.IMPOSSIBLE_VALUE, "sex",
                      "sex is neither F, M nor empty")
    return _split(frame, table, problems, scope, in_scope)


def reject_duplicates(clean: pd.DataFrame, table: c.Table, scope: str) -> Normalised:
    """Duplicate keys across all files of a table (see _check_duplicates)."""
    problems = _Problems(len(clean))
    _check_duplicates(clean, table, problems)
    return _split(clean.reset_index(drop=True), table, problems, scope, np.ones(len(clean), dtype=bool))


def _split(frame, table, problems, scope, in_scope) -> Normalised:
    ok = problems.ok & in_scope
    bad = ~problems.ok & in_scope
    rejects = pd.DataFrame({
        "table": table.name,
        "scope": scope,
        "row_key": _row_key(frame.loc[bad], table),   # keys of rejected rows only
        "file": frame.loc[bad, FILE_COLUMN].to_numpy(),
        "column": problems.column[bad],
        "reason": problems.reason[bad],
        "detail": problems.detail[bad],
    }, columns=c.REJECT_COLUMNS)
    placed = None
    if table is c.LAB:
        # A rejected lab row whose patient, time and analyte could still be read: alignment says
        # "a result was rejected (reason)" rather than "none measured". Never the value itself.
        placed = frame.loc[bad, PLACED_COLUMNS[:-1]].assign(reason=problems.reason[bad])
        placed = placed[placed[["patient_id", "collected_at", "analyte"]].notna().all(axis=1)].reset_index(drop=True)
    return Normalised(clean=frame.loc[ok].reset_index(drop=True), rejects=rejects.astype("str"), placed=placed)


def _partition_rows(frame, table, partitions, partition_dates) -> tuple[np.ndarray, np.ndarray]:
    """Per row: whether this read counts the rejects of its file's partition (`own`), and
    whether its readable time lies outside [date - slack, date + 1 day + slack) of that
    partition (`misfiled`). Worked out per file, then spread to rows through the file codes."""
    n = len(frame)
    own, misfiled = np.ones(n, dtype=bool), np.zeros(n, dtype=bool)
    if partitions is None or table.time_column is None or n == 0:
        return own, misfiled
    files = frame[FILE_COLUMN].astype("category")
    codes = files.cat.codes.to_numpy()
    days = [partitions.get(f) for f in files.cat.categories]          # one per file, not per row
    day = np.array([d if d is not None else "NaT" for d in days], dtype="datetime64[D]")
    slack = np.timedelta64(table.partition_slack_days, "D")
    first = (day - slack).astype("datetime64[us]")[codes]              # NaT: no partition
    end = (day + np.timedelta64(1, "D") + slack).astype("datetime64[us]")[codes]
    t = frame[table.time_column].to_numpy(dtype="datetime64[us]")      # UTC; NaT compares False
    misfiled = (t < first) | (t >= end)
    if partition_dates is not None:
        lo, hi = partition_dates
        own = np.array([d is None or lo <= d <= hi for d in days], dtype=bool)[codes]
    return own, misfiled


def _in_scope(frame, table, window, keep, own, misfiled) -> np.ndarray:
    """False for rows whose readable value puts them outside this run's scope. A row with an
    unreadable time, or timed outside its partition, is in scope where its partition is `own`."""
    inside = np.ones(len(frame), dtype=bool)
    if table.time_column is not None:
        t = frame[table.time_column]
        readable = t.notna().to_numpy()
        in_window = readable.copy()
        if window is not None:
            in_window &= ((t >= window[0]) & (t < window[1])).to_numpy()
        inside = (in_window & ~misfiled) | ((~readable | misfiled) & own)
    for name, values in (keep or {}).items():
        v = frame[name]
        inside &= ~(v.notna().to_numpy() & ~isin(v, values))
    return inside


def reject_rows(raw: pd.DataFrame, table: c.Table, settings: Settings, scope: str, reason: str,
                column: str, detail: str) -> pd.DataFrame:
    """Every row of `raw` as a reject with one reason (e.g. rows of a folder no run can place):
    the row's key where the key columns exist, else an empty key; never a value."""
    df = raw.rename(columns=settings.columns.get(table.name, {})).reset_index(drop=True)
    keys = pd.DataFrame({k: df[k] if k in df.columns else pd.Series("", index=df.index) for k in table.key},
                        index=df.index)
    return pd.DataFrame({
        "table": table.name, "scope": scope, "row_key": _row_key(keys, table),
        "file": df[FILE_COLUMN].to_numpy() if FILE_COLUMN in df.columns else "", "column": column,
        "reason": reason, "detail": detail,
    }, columns=c.REJECT_COLUMNS).astype("str")


def empty_table(table: c.Table) -> pd.DataFrame:
    return pd.DataFrame({col.name: _empty(col.kind, 0) for col in table.columns})


def empty_rejects() -> pd.DataFrame:
    return pd.DataFrame({name: pd.Series([], dtype="str") for name in c.REJECT_COLUMNS})


# ---------------------------------------------------------------------------------------------
# Parsing by kind

def _empty(kind: str, n: int) -> pd.Series:
    if kind == c.FLOAT:
        return pd.Series(np.full(n, np.nan))
    if kind == c.BOOL:
        return pd.Series(pd.array([pd.NA] * n, dtype="boolean"))
    if kind in (c.TIMESTAMP, c.DATE):
        return pd.Series(pd.NaT, index=range(n), dtype="datetime64[us, UTC]")
    return pd.Series([np.nan] * n, dtype="str")


def _parse(s: pd.Series, col: c.Column, settings: Settings, problems: _Problems) -> pd.Series:
    s = s.reset_index(drop=True)
    present = s.notna().to_numpy()
    if col.kind == c.STRING:
        out = _text(s, col, problems)
        present = out.notna().to_numpy() & (out.str.strip() != "").fillna(False).to_numpy()
        out = out.where(present)
    elif col.kind == c.FLOAT:
        out = _parse_float(s, col, problems, present)
    elif col.kind == c.BOOL:
        out = _parse_bool(s, col, problems, present)
    elif col.kind == c.TIMESTAMP:
        out = _parse_timestamp(s, col, settings, problems, present)
    else:
        out = _parse_date(s, col, problems, present)
    if not col.nullable:
        problems.flag(~present, c.MISSING_VALUE, col.name, "required value is empty")
    return out


def _text(s: pd.Series, col: c.Column, problems: _Problems) -> pd.Series:
    """A text column as str. Bytes (a binary Parquet column) are decoded as UTF-8; a value that is
    not valid UTF-8, or holds a NUL byte, is rejected per row (invalid_text), never passed on to
    break a later stage or the PostgreSQL store. Vectorised over the column."""
    if s.dtype == object and len(s) and s.map(type).eq(bytes).any():
        decoded = s.str.decode("utf-8", errors="replace")
        bad = decoded.str.contains("\ufffd", regex=False).fillna(False).to_numpy()
        problems.flag(bad, c.INVALID_TEXT, col.name, "text is not valid UTF-8")
        s = decoded.mask(bad)
    out = s.astype("str")
    nul = out.str.contains("\x00", regex=False).fillna(False).to_numpy()
    problems.flag(nul, c.INVALID_TEXT, col.name, "text holds a NUL byte")
    return out.mask(nul)


def _parse_float(s, col, problems, present):
    if pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype):
        return s.astype("float64")
    out = pd.to_numeric(s.astype("str").str.strip(), errors="coerce").astype("float64")
    problems.flag(present & out.isna().to_numpy(), c.WRONG_TYPE, col.name, "not a number")
    return out


def _parse_bool(s, col, problems, present):
    if pd.api.types.is_bool_dtype(s.dtype):
        return s.astype("boolean")
    text = s.astype("str").str.strip().str.lower()
    out = pd.Series(pd.array([pd.NA] * len(s), dtype="boolean"))
    out[text.isin(_TRUE).to_numpy()] = True
    out[text.isin(_FALSE).to_numpy()] = False
    problems.flag(present & out.isna().to_numpy(), c.WRONG_TYPE, col.name, "not true or false")
    return out


def _parse_timestamp(s, col, settings, problems, present):
    """UTC timestamps. Naive values are local times of the site's zone if the config names one
    (converted DST-correct; a wall time that does not exist or occurs twice is rejected), else
    rejected: a naive time is ambiguous by up to a day across sites."""
    if isinstance(s.dtype, pd.DatetimeTZDtype):
        return s.dt.tz_convert("UTC").dt.as_unit("us")
    if pd.api.types.is_datetime64_dtype(s.dtype):
        return _localise(s.dt.as_unit("us"), np.ones(len(s), dtype=bool) & present, col, settings, problems)
    text = s.astype("str").str.strip()
    has_offset = text.str.contains(_OFFSET_RE, regex=True, na=False).to_numpy()
    aware = pd.to_datetime(text.where(has_offset), format="ISO8601", utc=True, errors="coerce")
    naive_text = text.where(present & ~has_offset)
    naive = pd.to_datetime(naive_text, format="ISO8601", errors="coerce")
    problems.flag(present & has_offset & aware.isna().to_numpy(), c.UNPARSEABLE_TIMESTAMP, col.name,
                  "not an ISO 8601 timestamp")
    problems.flag(present & ~has_offset & naive.isna().to_numpy(), c.UNPARSEABLE_TIMESTAMP, col.name,
                  "not an ISO 8601 timestamp")
    local = _localise(naive.dt.as_unit("us"), present & ~has_offset & naive.notna().to_numpy(), col,
                      settings, problems)
    out = aware.dt.as_unit("us").where(has_offset, local)
    return out.astype("datetime64[us, UTC]")


def _localise(naive: pd.Series, is_naive: np.ndarray, col, settings: Settings, problems) -> pd.Series:
    if settings.timezone is None:
        problems.flag(is_naive, c.NAIVE_TIMESTAMP, col.name,
                      "timestamp has no UTC offset and the site config names no time zone")
        return pd.Series(pd.NaT, index=naive.index, dtype="datetime64[us, UTC]")
    local = naive.dt.tz_localize(settings.timezone, ambiguous="NaT", nonexistent="NaT")
    problems.flag(is_naive & local.isna().to_numpy(), c.NAIVE_TIMESTAMP, col.name,
                  f"local time skipped or repeated by a daylight-saving change in {settings.timezone}")
    return local.dt.tz_convert("UTC").dt.as_unit("us")


def _parse_date(s, col, problems, present):
    if isinstance(s.dtype, pd.DatetimeTZDtype):
        out = s.dt.tz_convert("UTC")
    else:
        # date32 arrives as object dates; strings as ISO text
        out = pd.to_datetime(s.astype("str") if s.dtype == object else s, errors="coerce", format="ISO8601")
        out = out.dt.tz_localize("UTC") if out.dt.tz is None else out.dt.tz_convert("UTC")
    out = out.dt.normalize().dt.as_unit("us")
    problems.flag(present & out.isna().to_numpy(), c.WRONG_TYPE, col.name, "not a date")
    return out


# ---------------------------------------------------------------------------------------------
# Units, bounds, duplicates

def _convert_units(frame: pd.DataFrame, table: c.Table, settings: Settings, problems: _Problems) -> None:
    if table is c.ECG:
        for name, unit in settings.time_units.items():
            frame[name] = frame[name] * c.TIME_UNITS[unit]
        derived = 60_000.0 / frame["heart_rate_bpm"]                 # RR (ms) = 60 000 / HR (bpm)
        frame["rr_ms"] = frame["rr_ms"].fillna(derived)
    elif table is c.ECG_LEAD:
        factor = c.AMPLITUDE_UNITS[settings.amplitude_unit]
        for name in ("p_amp_uv", "r_amp_uv", "s_amp_uv", "st_j_uv", "t_amp_uv"):
            frame[name] = frame[name] * factor
    elif table is c.LAB:
        _convert_lab_units(frame, settings, problems)


def _convert_lab_units(frame: pd.DataFrame, settings: Settings, problems: _Problems) -> None:
    """Map local codes to LOINC, bring each known analyte to its canonical unit, check bounds."""
    unit = frame["unit"].replace(c.UNIT_ALIASES)
    frame["unit"] = unit
    analyte = frame["analyte"].map(settings.analyte_of_code())
    for name, (canonical, factors, (low, high)) in c.ANALYTE_UNITS.items():
        rows = (analyte == name).to_numpy()
        if not rows.any():
            continue
        factor = unit.map(factors).to_numpy(dtype=float, na_value=np.nan)
        problems.flag(rows & np.isnan(factor), c.UNKNOWN_UNIT, "unit", f"unit not known for {name}")
        converted = frame["value"].to_numpy() * factor
        frame.loc[rows, "value"] = converted[rows]
        frame.loc[rows & ~np.isnan(factor), "unit"] = canonical
        value = frame["value"].to_numpy()
        problems.flag(rows & ((value < low) | (value > high)), c.IMPOSSIBLE_VALUE, "value",
                      f"{name} outside {low:g}-{high:g} {canonical}")


def _check_bounds(frame: pd.DataFrame, table: c.Table, problems: _Problems) -> None:
    for col in table.columns:
        if col.low is None and col.high is None:
            continue
        v = frame[col.name].to_numpy(dtype=float, na_value=np.nan)
        bad = np.zeros(len(v), dtype=bool)
        if col.low is not None:
            bad |= v < col.low
        if col.high is not None:
            bad |= v > col.high
        problems.flag(bad, c.IMPOSSIBLE_VALUE, col.name, f"outside {col.low:g} to {col.high:g} {col.unit}")


def _check_duplicates(frame: pd.DataFrame, table: c.Table, problems: _Problems) -> None:
    """Identical copies of a row keep one and reject the rest; copies that disagree are all
    rejected, since nothing says which one the device or laboratory meant."""
    if not table.key:
        return
    key = list(table.key)
    dup_key = frame.duplicated(key, keep=False).to_numpy() & problems.ok
    if not dup_key.any():
        return
    content = [col for col in table.column_names]
    sub = frame.loc[dup_key, content]
    exact_later = sub.duplicated(content, keep="first")
    distinct_versions = sub.drop_duplicates(content).groupby(key, dropna=False, observed=True).size()
    conflicting = sub.set_index(key).index.isin(distinct_versions[distinct_versions > 1].index)
    idx = np.flatnonzero(dup_key)
    copy_mask = np.zeros(len(frame), dtype=bool)
    copy_mask[idx[exact_later.to_numpy() & ~conflicting]] = True
    conflict_mask = np.zeros(len(frame), dtype=bool)
    conflict_mask[idx[conflicting]] = True
    label = "+".join(key)
    problems.flag(conflict_mask, c.DUPLICATE_ID, label, "same id with different values; all copies rejected")
    problems.flag(copy_mask, c.DUPLICATE_ID, label, "identical copy of another row; one copy kept")


def _row_key(frame: pd.DataFrame, table: c.Table) -> np.ndarray:
    if not table.key:
        return np.full(len(frame), "", dtype=object)
    keys = frame[list(table.key)].astype("str").fillna("")
    joined = keys.iloc[:, 0].str.cat([keys[k] for k in table.key[1:]], sep="|") if len(table.key) > 1 else keys.iloc[:, 0]
    return joined.to_numpy(dtype=object)
