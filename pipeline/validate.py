"""`cardiosieve validate`: the contract over the whole lake (or one interval), rejects only.

Unlike a nightly run this reads every partition asked for, so its cost grows with the range:
it is meant for onboarding a new export or checking a backfill, not for the nightly path.
"""
from __future__ import annotations

from pathlib import Path

import pandas as pd

from pipeline import contract as c
from pipeline.config import load_settings
from pipeline.files import write_parquet_atomic
from pipeline.load import read_table
from pipeline.run import _reasons, interval


def validate_lake(lake, config=None, start=None, end=None, out=None) -> dict:
    settings = load_settings(config)
    window = interval(start, end) if start or end else None
    tables, rejects = {}, []
    for table in c.TABLES.values():
        if table.optional and not (Path(lake) / table.name).is_dir():
            continue
        got = read_table(lake, table, settings, scope="lake", window=window if table.time_column else None)
        tables[table.name] = {"rows_in": got.rows_in, "accepted": len(got.clean), "rejected": len(got.rejects),
                              "files": got.files}
        rejects.append(got.rejects)
    all_rejects = pd.concat(rejects, ignore_index=True)
    result = {"scope": f"[{window[0].isoformat()}, {window[1].isoformat()})" if window else "whole lake",
              "tables": tables, "rejects_by_reason": _reasons(all_rejects)}
    if out:
        Path(out).mkdir(parents=True, exist_ok=True)
        result["rejects_path"] = str(write_parquet_atomic(all_rejects, Path(out) / "rejects.parquet"))
    return result
