"""The aligned archive: what the screens read for every chunk a run screened, kept for replay.

A published run keeps its aligned table only while it is one of the last few run folders
(publish.KEEP_RUNS). `cardiosieve replay` (pipeline/replay.py) re-screens history under other
thresholds, so every chunk a run screens (a night, each chunk of a backfill; the CLI's
run_interval and the Airflow tasks alike: stage_worklist writes it) also leaves, after the
store's commit,

    OUT/aligned_history/<run id of the chunk>/   aligned.parquet  the chunk's aligned table
                                                 leads.parquet    the leads the screens read for it:
                                                                  the chunk's checked leads and the
                                                                  chosen prior ECGs' leads
                                                 archive.json     interval [lo, hi), when written,
                                                                  row counts (no row values)

The folder is built under a hidden name (.building-<pid>-<token>) and renamed into place, so a
reader sees a whole folder or none; a rerun of the same interval replaces its own folder the
same way (the old one is renamed aside, then removed). What a killed run leaves under a hidden
name is removed by the next run (publish.clean_leftovers). Folders are owner-only, files 0600
(pipeline/files.py). The archive grows with history and is never pruned by cardiosieve: a site
removes old folders by date if it wants (docs/operations.md); a night writes its own folder
only, so the nightly cost does not grow with it.

`archive_folders` lists the folders with their intervals, for replay. Nothing here logs a row.
"""
from __future__ import annotations

import json
import os
import secrets
import shutil
import time
from pathlib import Path

from cardiosieve.pipeline.files import private_dir, write_parquet_atomic, write_text_atomic

ARCHIVE_DIR = "aligned_history"
ARCHIVE_ALIGNED, ARCHIVE_LEADS, ARCHIVE_META = "aligned.parquet", "leads.parquet", "archive.json"
ARCHIVE_FORMAT = 1          # archive.json "format": bump when the folder's layout changes
BUILDING_PREFIX = ".building-"


def archive_chunk(out, lo, hi, aligned, leads) -> Path:
    """Write (or replace) OUT/aligned_history/<lo>_<hi>/ with the chunk's aligned table and the
    leads the screens read for it; returns the folder."""
    root = private_dir(Path(out) / ARCHIVE_DIR)
    name = f"{lo:%Y%m%dT%H%M%SZ}_{hi:%Y%m%dT%H%M%SZ}"          # = run.chunk_run_id(lo, hi)
    building = root / f"{BUILDING_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"
    building.mkdir(mode=0o700)
    os.chmod(building, 0o700)
    try:
        write_parquet_atomic(aligned, building / ARCHIVE_ALIGNED)
        write_parquet_atomic(leads, building / ARCHIVE_LEADS)
        meta = {"format": ARCHIVE_FORMAT, "interval": [lo.isoformat(), hi.isoformat()],
                # Wall-clock time of writing: only which copy of an ECG is the latest depends on it.
                "written_at_ns": time.time_ns(), "aligned_rows": int(len(aligned)), "lead_rows": int(len(leads))}
        write_text_atomic(json.dumps(meta, indent=2, sort_keys=True), building / ARCHIVE_META)
        _fsync(building)
        final = root / name
        aside = None
        if final.exists():
            aside = root / f"{BUILDING_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"
            os.rename(final, aside)
        os.rename(building, final)
        _fsync(root)
    except BaseException:
        shutil.rmtree(building, ignore_errors=True)
        raise
    if aside is not None:
        shutil.rmtree(aside, ignore_errors=True)
    return final


def archive_folders(out) -> list[dict]:
    """The archive's complete folders, oldest written first: {"path", "lo", "hi", "written_at_ns"}.
    A folder without a readable archive.json (not one of ours, or of a later format) is skipped."""
    import pandas as pd

    root = Path(out) / ARCHIVE_DIR
    if not root.is_dir():
        return []
    found = []
    for folder in root.iterdir():
        if folder.name.startswith(".") or not folder.is_dir():
            continue
        try:
            meta = json.loads((folder / ARCHIVE_META).read_text(encoding="utf-8"))
            if meta.get("format") != ARCHIVE_FORMAT:
                continue
            lo, hi = (pd.Timestamp(t).tz_convert("UTC") for t in meta["interval"])
            written = int(meta["written_at_ns"])
        except (OSError, ValueError, KeyError, TypeError):
            continue
        if (folder / ARCHIVE_ALIGNED).exists() and (folder / ARCHIVE_LEADS).exists():
            found.append({"path": folder, "lo": lo, "hi": hi, "written_at_ns": written})
    return sorted(found, key=lambda f: (f["written_at_ns"], f["path"].name))


def _fsync(folder: Path) -> None:
    try:                                  # POSIX; not available everywhere
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        pass
