"""`cardiosieve validate`: the contract over the whole lake (or one interval), rejects only.

Unlike a nightly run this reads every partition asked for, so its cost grows with the range:
it is meant for onboarding a new export or checking a backfill, not for the nightly path.

It also reports what no nightly run can place (pipeline/load.py): rows timed outside their
`date=` partition by more than the slack (outside_partition; over an interval, those of the
partitions dated in it), and every row in a table subfolder not named date=YYYY-MM-DD
(bad_partition_name, listed per folder in `misnamed_partitions` whatever the interval, since
such a folder has no date; a run stops on it instead, exit 2).
"""
from __future__ import annotations

from pathlib import Path

import pandas as pd

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.config import load_settings
from cardiosieve.pipeline.files import private_dir, write_parquet_atomic
from cardiosieve.pipeline.load import read_table
from cardiosieve.pipeline.run import _reasons, interval

# Its own name: OUT/rejects.parquet of a run's folder is a link into the published run (pipeline/publish.py).
VALIDATION_REJECTS = "validation_rejects.parquet"


def validate_lake(lake, config=None, start=None, end=None, out=None) -> dict:
    settings = load_settings(config)
    window = interval(start, end) if start or end else None
    tables, rejects = {}, []
    for table in c.TABLES.values():
        if table.optional and not (Path(lake) / table.name).is_dir():
            continue
        got = read_table(lake, table, settings, scope="lake", window=window if table.time_column else None,
                         misnamed="reject")
        tables[table.name] = {"rows_in": got.rows_in, "accepted": len(got.clean), "rejected": len(got.rejects),
                              "files": got.files}
        rejects.append(got.rejects)
    all_rejects = pd.concat(rejects, ignore_index=True)
    result = {"scope": f"[{window[0].isoformat()}, {window[1].isoformat()})" if window else "whole lake",
              "tables": tables, "rejects_by_reason": _reasons(all_rejects),
              "misnamed_partitions": _misnamed_partitions(lake, all_rejects)}
    if out:
        private_dir(Path(out))
        result["rejects_path"] = str(write_parquet_atomic(all_rejects, Path(out) / VALIDATION_REJECTS))
    return result


def _misnamed_partitions(lake, rejects: pd.DataFrame) -> dict[str, int]:
    """Rows per misnamed folder, by its path relative to the lake (e.g. "ecg/date=2026-13-01")."""
    bad = rejects[rejects["reason"] == c.BAD_PARTITION_NAME]
    if bad.empty:
        return {}
    out: dict[str, int] = {}
    for file, n in bad["file"].value_counts().items():                 # per file, not per row
        folder = "/".join(Path(file).relative_to(Path(lake)).parts[:2])
        out[folder] = out.get(folder, 0) + int(n)
    return dict(sorted(out.items()))
