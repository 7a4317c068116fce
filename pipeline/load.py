"""Read the lake: only the partitions and rows a run needs, through pyarrow.dataset.

A table is a folder of Parquet files under the lake, optionally in hive partitions
`date=YYYY-MM-DD` by the UTC date of the table's time column. The reader lists only the
partitions inside the window it is asked for (one `scandir` of the table folder, then only the
chosen folders), so a night's cost does not grow with the years the lake holds. Files are grouped
by their physical schema and each group is scanned with its own schema: a pyarrow scan with one
shared schema would silently cast a file of naive timestamps to UTC. Filters on time, patient,
ECG and analyte are pushed down where the file's column type allows it; the rest is filtered
after parsing (see pipeline/normalise.py).

Rows outside their partition are never lost. A partition `date=D` may hold rows timed in
[D - slack, D + 1 day + slack) (slack: the table's `partition_slack_days`, for exporters that
partition by local date). A row timed outside that range (outside_partition), like a row whose
time cannot be read, belongs to its partition, not to any window: it is never accepted, and
it is rejected by exactly one run, the one whose own night holds D. So:
  - the scan of each partition keeps the rows in the window and inside the partition's range,
    and, for a partition the read counts (`own`), also the rows outside its range or with no
    time (pushed down per file as its partition's bounds: only the partitions the window
    needs are listed, and a normal partition contributes no extra rows);
  - a read counts the partitions whose date lies in its window's dates and in `night`, the
    run's own interval (default: the window). The night's ECG read counts tonight's partitions;
    a context read (ECG history, labs, medication) told `night=(lo, hi)` counts only tonight's
    partitions too, so that a misfiled row in an old partition is not rejected again by every
    later night: it was rejected by its own night's run. The context reads count their rows
    only for the run's patients (`keep`), like every context row.
A row misfiled by more than the slack into a partition that no run of its time reads (timed
tonight, filed last week) is therefore rejected by last week's run, and `cardiosieve validate`
finds it over the whole lake.

Every subfolder of a table folder is a date partition: a folder named otherwise (not `date=`
followed by a real YYYY-MM-DD date, e.g. `date=2026-13-01`, `date=yesterday`, `2026-11-29`) is
a LakeError for a run (exit 2, naming the folder relative to the lake): no run can tell which
night its rows belong to, so none can screen safely until an operator renames it (or prefixes
it with `_` to set it aside). `validate` reads such folders' rows as rejects
(bad_partition_name) instead, so that an operator sees how many rows wait there.

A damaged file is a LakeError naming the file; nothing is skipped silently. An I/O error of the
system (errno set: a mount away, EIO) propagates as OSError, for the scheduler to retry.
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.config import Settings
from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.normalise import (FILE_COLUMN, ContractError, Normalised, empty_rejects, empty_table,
                                normalise_table, reject_duplicates, reject_rows)


def _corrupt(exc: BaseException) -> bool:
    """True when a read failed on the file's content (a retry cannot help): pyarrow's own errors,
    and the OSError without errno that it raises for a damaged footer or metadata. An OSError
    with errno (a mount away, EIO, a vanished file) is left to propagate: the scheduler retries."""
    return isinstance(exc, pa.ArrowException) or (isinstance(exc, OSError) and exc.errno is None)


class LakeError(BadInputError):
    """The lake cannot be read as the contract describes (missing table, unreadable file)."""


@dataclass
class Loaded:
    """One table's rows in scope: clean contract rows and rejects, with counts that reconcile."""
    clean: pd.DataFrame
    rejects: pd.DataFrame
    files: int
    placed: pd.DataFrame | None = None   # lab: rejected rows that can still be placed (normalise.py)

    @property
    def rows_in(self) -> int:
        return len(self.clean) + len(self.rejects)


PARTITION_PREFIX = "date="
_DAY_RE = re.compile(r"\d{4}-\d{2}-\d{2}")
MISNAMED_DETAIL = "in a folder not named date=YYYY-MM-DD: which night its rows belong to is unknown"


def partition_day(name: str) -> str | None:
    """The date of a partition folder named `date=YYYY-MM-DD` (a real calendar date), else None."""
    if not name.startswith(PARTITION_PREFIX) or not _DAY_RE.fullmatch(day := name[len(PARTITION_PREFIX):]):
        return None
    try:
        date.fromisoformat(day)
    except ValueError:
        return None
    return day


def _is_data(name: str) -> bool:
    return not name.startswith(("_", "."))       # pyarrow's convention: "_" and "." are not data


def _parquet_under(folder: Path, root: Path) -> list[Path]:
    return [p for p in Path(folder).rglob("*.parquet") if all(_is_data(part) for part in p.relative_to(root).parts)]


def _listing(lake, table: c.Table, first_day=None, last_day=None, days=None) -> tuple[list[Path], list[Path]]:
    """(Parquet files of the chosen partitions and of the table folder itself, misnamed
    subfolders), from one scandir of the table folder."""
    root = Path(lake) / table.name
    if not root.is_dir():
        if table.optional:
            return [], []
        raise LakeError(f"the lake has no '{table.name}/' table folder (looked in {root})")
    chosen: list[Path] = []
    misnamed: list[Path] = []
    with os.scandir(root) as entries:
        for e in entries:
            if not _is_data(e.name):
                continue
            if e.is_dir():
                day = partition_day(e.name)
                if day is None:
                    misnamed.append(Path(e.path))
                    continue
                if first_day is not None and not first_day <= day <= last_day:
                    continue
                if days is not None and day not in days:
                    continue
                chosen.extend(_parquet_under(Path(e.path), root))
            elif e.name.endswith(".parquet"):
                chosen.append(Path(e.path))
    return sorted(chosen), sorted(misnamed)


def table_files(lake: str | Path, table: c.Table, first_day: str | None = None,
                last_day: str | None = None, days: set[str] | None = None) -> list[Path]:
    """Parquet files of `table`, limited to partitions date=first_day..last_day and to the
    partitions named in `days`, when given. A subfolder that is not a date partition is a
    LakeError (module docstring). Names starting with "_" or "." are not data."""
    files, misnamed = _listing(lake, table, first_day, last_day, days)
    if misnamed:
        raise LakeError(misnamed_message(lake, misnamed))
    return files


def misnamed_message(lake, folders: list[Path]) -> str:
    """One line naming the misnamed folders relative to the lake (folder names, never rows)."""
    names = [p.relative_to(Path(lake)).as_posix() for p in folders]
    shown = ", ".join(names[:3]) + (f" and {len(names) - 3} more" if len(names) > 3 else "")
    return (f"lake folder(s) {shown} not named date=YYYY-MM-DD: which night their rows belong to is "
            f"unknown; rename each to the date of its rows, or prefix it with '_' to set it aside "
            f"(cardiosieve validate counts their rows)")


def file_day(lake, table: c.Table, f: Path) -> str | None:
    """The date of the partition folder `f` lies in, None for a file in the table folder itself."""
    parts = f.relative_to(Path(lake) / table.name).parts
    return partition_day(parts[0]) if len(parts) > 1 else None


def _days_of(window: tuple[pd.Timestamp, pd.Timestamp]) -> tuple[str, str]:
    """The dates [first, last] of a half-open interval's instants."""
    return window[0].strftime("%Y-%m-%d"), (window[1] - pd.Timedelta(microseconds=1)).strftime("%Y-%m-%d")


def read_table(lake: str | Path, table: c.Table, settings: Settings, *, scope: str,
               window: tuple[pd.Timestamp, pd.Timestamp] | None = None,
               keep: dict[str, object] | None = None, columns: list[str] | None = None,
               days: set[str] | None = None, night: tuple[pd.Timestamp, pd.Timestamp] | None = None,
               misnamed: str = "raise") -> Loaded:
    """Contract rows of `table` in scope: time column in [window), `keep` columns in their sets.

    `columns` limits the contract columns read (the required ones are always read); `days`
    limits a table without a time column (ecg_lead) to the date partitions named. `night` is
    the run's own interval: rows that belong to their partition (unreadable time, timed outside
    it) are counted only for partitions dated in both the window and the night (default: the
    window). `misnamed="reject"` (validate) reads the rows of folders that are not date
    partitions as bad_partition_name rejects instead of raising LakeError."""
    first_day = last_day = None
    partition_dates = None
    if window is not None and table.time_column is not None:
        slack = pd.Timedelta(days=table.partition_slack_days)
        first_day = (window[0] - slack).strftime("%Y-%m-%d")
        last_day = (window[1] + slack).strftime("%Y-%m-%d")
        partition_dates = _days_of(window)
        if night is not None:
            own_first, own_last = _days_of(night)
            partition_dates = (max(partition_dates[0], own_first), min(partition_dates[1], own_last))
    files, bad_folders = _listing(lake, table, first_day, last_day, days)
    if bad_folders and misnamed != "reject":
        raise LakeError(misnamed_message(lake, bad_folders))
    partitions = {str(f): file_day(lake, table, f) for f in files}
    wanted = None if columns is None else set(columns) | {col.name for col in table.columns if col.required}
    site_names = {v: k for k, v in settings.columns.get(table.name, {}).items()}  # contract -> site

    parts, rejects, placed = [], [], []
    for schema, group in _schema_groups(files):
        present = [name for name in schema.names if _contract_name(name, settings, table) is not None
                   and (wanted is None or _contract_name(name, settings, table) in wanted)]
        missing = [col.name for col in table.columns
                   if col.required and site_names.get(col.name, col.name) not in schema.names]
        if missing:
            raise ContractError(f"table {table.name}: file {group[0]} lacks required column(s) {missing}")
        expr, bounded = _pushdown(schema, table, settings, window, keep)
        guarantees = _partition_guarantees(group, partitions, table, partition_dates) if bounded else None
        raw = _scan(group, schema, present, expr, guarantees)
        got = normalise_table(raw, table, settings, scope=scope, source=str(group[0]), window=window,
                              keep=keep, partition_dates=partition_dates, partitions=partitions)
        parts.append(got.clean)
        rejects.append(got.rejects)
        if got.placed is not None:
            placed.append(got.placed)
    n_files = len(files)
    if bad_folders:
        bad_files = [f for folder in bad_folders for f in _parquet_under(folder, Path(lake) / table.name)]
        rejects.append(_misnamed_rejects(bad_files, table, settings, scope))
        n_files += len(bad_files)
    if not parts:
        return Loaded(clean=empty_table(table), rejects=_concat_rejects(rejects), files=n_files)
    clean = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]
    dedup = reject_duplicates(clean, table, scope)
    rejects.append(dedup.rejects)
    if dedup.placed is not None:
        placed.append(dedup.placed)
    placed_all = pd.concat(placed, ignore_index=True) if placed else None
    return Loaded(clean=dedup.clean.drop(columns=FILE_COLUMN), rejects=_concat_rejects(rejects),
                  files=n_files, placed=placed_all)


def misnamed_folders(lake: str | Path, table: c.Table) -> list[Path]:
    """The subfolders of `table` that are not date partitions (validate lists them)."""
    return _listing(lake, table)[1]


def _misnamed_rejects(files: list[Path], table: c.Table, settings: Settings, scope: str) -> pd.DataFrame:
    """Every row of the files in misnamed folders, as bad_partition_name rejects: the key columns
    only are read (one file at a time; a damaged file is a LakeError, as anywhere)."""
    key_names = {settings.columns.get(table.name, {}).get(k, k) for k in table.key} | set(table.key)
    parts = []
    for f in files:
        try:
            names = pq.read_schema(f).names
            tbl = pq.read_table(f, columns=[n for n in names if n in key_names])
        except (pa.ArrowException, OSError) as exc:
            if not _corrupt(exc):
                raise
            raise LakeError(f"cannot read {f}: not a readable Parquet file ({type(exc).__name__})") from None
        raw = tbl.to_pandas() if tbl.num_columns else pd.DataFrame(index=range(tbl.num_rows))
        raw[FILE_COLUMN] = str(f)
        parts.append(reject_rows(raw, table, settings, scope, c.BAD_PARTITION_NAME, "", MISNAMED_DETAIL))
    return _concat_rejects(parts)


def _contract_name(site_name: str, settings: Settings, table: c.Table) -> str | None:
    name = settings.columns.get(table.name, {}).get(site_name, site_name)
    return name if name in table.column_names else None


def _schema_groups(files: list[Path]) -> list[tuple[pa.Schema, list[Path]]]:
    groups: dict[str, tuple[pa.Schema, list[Path]]] = {}
    for f in files:
        try:
            schema = pq.read_schema(f)
        except (pa.ArrowException, OSError) as exc:
            if not _corrupt(exc):
                raise
            raise LakeError(f"cannot read {f}: not a readable Parquet file ({type(exc).__name__})") from None
        schema = schema.remove_metadata()
        key = schema.to_string()
        groups.setdefault(key, (schema, []))[1].append(f)
    return list(groups.values())


_UTC_US = pa.timestamp("us", tz="UTC")
# Per-file constants the scan filter compares with: the partition's bounds and whether the read
# counts its rejects. They exist in no file: each file's partition guarantee supplies them.
_P_FIRST, _P_END, _P_OWN = "__partition_first", "__partition_end", "__partition_own"
_NO_PARTITION = (datetime(1, 1, 1, tzinfo=timezone.utc), datetime(9999, 12, 31, tzinfo=timezone.utc))


def _pushdown(schema: pa.Schema, table: c.Table, settings: Settings, window, keep):
    """A filter on the columns whose physical type lets pyarrow evaluate it exactly, and whether
    it compares with the per-file partition bounds (`_partition_guarantees`)."""
    site = {v: k for k, v in settings.columns.get(table.name, {}).items()}
    expr = None
    bounded = False

    def add(e):
        nonlocal expr
        expr = e if expr is None else expr & e

    if window is not None and table.time_column is not None:
        name = site.get(table.time_column, table.time_column)
        typ = schema.field(name).type
        if pa.types.is_timestamp(typ) and typ.tz is not None:
            lo = pa.scalar(window[0].to_pydatetime(), type=_UTC_US)
            hi = pa.scalar(window[1].to_pydatetime(), type=_UTC_US)
            t, first, end = ds.field(name), ds.field(_P_FIRST), ds.field(_P_END)
            inside = (t >= first) & (t < end)
            # In the window and inside its partition; or, in a partition this read counts,
            # timed outside it or not at all (rejects: outside_partition, missing_value).
            add(((t >= lo) & (t < hi) & inside) | (ds.field(_P_OWN) & (t.is_null() | ~inside)))
            bounded = True
    for col, values in (keep or {}).items():
        name = site.get(col, col)
        if name in schema.names and pa.types.is_string(schema.field(name).type) or \
                name in schema.names and pa.types.is_large_string(schema.field(name).type):
            values = list(values)
            if col == "analyte" and settings.lab_codes:
                values += [k for k, v in settings.lab_codes.items() if v in set(values)]
            add(ds.field(name).isin(pa.array(values, type=pa.string())))
    return expr, bounded


def _partition_guarantees(files: list[Path], partitions: dict[str, str | None], table: c.Table,
                          partition_dates: tuple[str, str] | None) -> list[ds.Expression]:
    """Per file: its partition's bounds [date - slack, date + 1 day + slack) and whether the read
    counts its rejects, as the equalities pyarrow simplifies the scan filter with."""
    slack = timedelta(days=table.partition_slack_days)
    out = []
    for f in files:
        day = partitions[str(f)]
        if day is None:                      # outside any partition: every read counts its rows
            first, end, own = *_NO_PARTITION, True
        else:
            d = datetime.fromisoformat(day).replace(tzinfo=timezone.utc)
            first, end = d - slack, d + timedelta(days=1) + slack
            own = partition_dates is None or partition_dates[0] <= day <= partition_dates[1]
        out.append((ds.field(_P_FIRST) == pa.scalar(first, type=_UTC_US))
                   & (ds.field(_P_END) == pa.scalar(end, type=_UTC_US))
                   & (ds.field(_P_OWN) == pa.scalar(own)))
    return out


def _scan(files: list[Path], schema: pa.Schema, columns: list[str], expr,
          guarantees: list[ds.Expression] | None = None) -> pd.DataFrame:
    try:
        if guarantees is None:
            dataset = ds.dataset([str(f) for f in files], schema=schema, format="parquet")
        else:
            with_bounds = schema.append(pa.field(_P_FIRST, _UTC_US)).append(pa.field(_P_END, _UTC_US)) \
                                .append(pa.field(_P_OWN, pa.bool_()))
            dataset = ds.FileSystemDataset.from_paths([str(f) for f in files], schema=with_bounds,
                                                      format=ds.ParquetFileFormat(),
                                                      filesystem=pafs.LocalFileSystem(), partitions=guarantees)
        scanner = ds.Scanner.from_dataset(dataset, columns=columns + ["__filename"], filter=expr)
        tbl = scanner.to_table()
    except (pa.ArrowException, OSError) as scan_exc:
        if not _corrupt(scan_exc):
            raise
        for f in files:                      # find the file to name
            try:
                pq.read_table(f, columns=columns)
            except (pa.ArrowException, OSError) as exc:
                if not _corrupt(exc):
                    raise
                raise LakeError(f"cannot read {f}: {type(exc).__name__}") from None
        raise
    df = tbl.to_pandas(types_mapper={pa.string(): pd.StringDtype("pyarrow", na_value=np.nan),
                                     pa.large_string(): pd.StringDtype("pyarrow", na_value=np.nan)}.get)
    return df.rename(columns={"__filename": FILE_COLUMN})


def _concat_rejects(parts: list[pd.DataFrame]) -> pd.DataFrame:
    parts = [p for p in parts if len(p)]
    return pd.concat(parts, ignore_index=True) if parts else empty_rejects()
