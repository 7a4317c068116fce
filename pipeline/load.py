"""Read the lake: only the partitions and rows a run needs, through pyarrow.dataset.

A table is a folder of Parquet files under the lake, optionally in hive partitions
`date=YYYY-MM-DD` by the UTC date of the table's time column. The reader lists only the
partitions inside the window it is asked for (one `scandir` of the table folder, then only the
chosen folders), so a night's cost does not grow with the years the lake holds. Files are grouped
by their physical schema and each group is scanned with its own schema: a pyarrow scan with one
shared schema would silently cast a file of naive timestamps to UTC. Filters on time, patient,
ECG and analyte are pushed down where the file's column type allows it; the rest is filtered
after parsing (see pipeline/normalise.py).

A damaged file is a LakeError naming the file; nothing is skipped silently. An I/O error of the
system (errno set: a mount away, EIO) propagates as OSError, for the scheduler to retry.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from pipeline import contract as c
from pipeline.config import Settings
from pipeline.errors import BadInputError
from pipeline.normalise import (FILE_COLUMN, ContractError, Normalised, empty_rejects, empty_table,
                                normalise_table, reject_duplicates)


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


def table_files(lake: str | Path, table: c.Table, first_day: str | None = None,
                last_day: str | None = None, days: set[str] | None = None) -> list[Path]:
    """Parquet files of `table`, limited to partitions date=first_day..last_day and to the
    partitions named in `days`, when given.

    Names starting with "_" or "." are not data (pyarrow's convention)."""
    root = Path(lake) / table.name
    if not root.is_dir():
        if table.optional:
            return []
        raise LakeError(f"the lake has no '{table.name}/' table folder (looked in {root})")
    chosen: list[Path] = []
    with os.scandir(root) as entries:
        for e in entries:
            if e.name.startswith(("_", ".")):
                continue
            if e.is_dir():
                if e.name.startswith("date="):
                    day = e.name[5:]
                    if first_day is not None and not first_day <= day <= last_day:
                        continue
                    if days is not None and day not in days:
                        continue
                chosen.extend(p for p in Path(e.path).rglob("*.parquet")
                              if not any(part.startswith(("_", ".")) for part in p.relative_to(root).parts))
            elif e.name.endswith(".parquet"):
                chosen.append(Path(e.path))
    return sorted(chosen)


def read_table(lake: str | Path, table: c.Table, settings: Settings, *, scope: str,
               window: tuple[pd.Timestamp, pd.Timestamp] | None = None,
               keep: dict[str, object] | None = None, columns: list[str] | None = None,
               days: set[str] | None = None) -> Loaded:
    """Contract rows of `table` in scope: time column in [window), `keep` columns in their sets.

    `columns` limits the contract columns read (the required ones are always read); `days`
    limits a table without a time column (ecg_lead) to the date partitions named."""
    first_day = last_day = None
    partition_dates = None
    if window is not None and table.time_column is not None:
        slack = pd.Timedelta(days=table.partition_slack_days)
        first_day = (window[0] - slack).strftime("%Y-%m-%d")
        last_day = (window[1] + slack).strftime("%Y-%m-%d")
        partition_dates = (window[0].strftime("%Y-%m-%d"),
                           (window[1] - pd.Timedelta(microseconds=1)).strftime("%Y-%m-%d"))
    files = table_files(lake, table, first_day, last_day, days)
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
        expr = _pushdown(schema, table, settings, window, keep)
        raw = _scan(group, schema, present, expr)
        got = normalise_table(raw, table, settings, scope=scope, source=str(group[0]), window=window,
                              keep=keep, partition_dates=partition_dates)
        parts.append(got.clean)
        rejects.append(got.rejects)
        if got.placed is not None:
            placed.append(got.placed)
    if not parts:
        return Loaded(clean=empty_table(table), rejects=empty_rejects(), files=0)
    clean = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]
    dedup = reject_duplicates(clean, table, scope)
    rejects.append(dedup.rejects)
    if dedup.placed is not None:
        placed.append(dedup.placed)
    placed_all = pd.concat(placed, ignore_index=True) if placed else None
    return Loaded(clean=dedup.clean.drop(columns=FILE_COLUMN), rejects=_concat_rejects(rejects),
                  files=len(files), placed=placed_all)


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


def _pushdown(schema: pa.Schema, table: c.Table, settings: Settings, window, keep):
    """A filter on the columns whose physical type lets pyarrow evaluate it exactly."""
    site = {v: k for k, v in settings.columns.get(table.name, {}).items()}
    expr = None

    def add(e):
        nonlocal expr
        expr = e if expr is None else expr & e

    if window is not None and table.time_column is not None:
        name = site.get(table.time_column, table.time_column)
        typ = schema.field(name).type
        if pa.types.is_timestamp(typ) and typ.tz is not None:
            lo = pa.scalar(window[0].to_pydatetime(), type=pa.timestamp("us", tz="UTC"))
            hi = pa.scalar(window[1].to_pydatetime(), type=pa.timestamp("us", tz="UTC"))
            add((ds.field(name) >= lo) & (ds.field(name) < hi))
    for col, values in (keep or {}).items():
        name = site.get(col, col)
        if name in schema.names and pa.types.is_string(schema.field(name).type) or \
                name in schema.names and pa.types.is_large_string(schema.field(name).type):
            values = list(values)
            if col == "analyte" and settings.lab_codes:
                values += [k for k, v in settings.lab_codes.items() if v in set(values)]
            add(ds.field(name).isin(pa.array(values, type=pa.string())))
    return expr


def _scan(files: list[Path], schema: pa.Schema, columns: list[str], expr) -> pd.DataFrame:
    try:
        dataset = ds.dataset([str(f) for f in files], schema=schema, format="parquet")
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
