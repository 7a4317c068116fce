"""One run, one published state: a run's outputs are switched in together, with one rename.

Layout of OUT (see docs/operations.md):

    OUT/runs/<run id>-<token>/   one folder per published run: worklist.parquet, aligned.parquet,
                                 rejects.parquet, criteria_<screen>.parquet, quality.json,
                                 quality.html, run_summary.json
    OUT/current                  a symbolic link to the published run's folder
    OUT/<name>                   a symbolic link to current/<name>, for each published name
    OUT/worklist.sqlite          the worklist store (the default SQLite one)
    OUT/_stage/<interval>/       the stages' working files (checkpoints between DAG tasks)
    OUT/gate_stopped/            the quality report of a run the gate stopped, until a run publishes
    OUT/aligned_history/<chunk>/ every chunk's aligned table and leads, for replay (pipeline/archive.py)

`publish` builds the run's folder under a hidden name, flushes it to disk, renames it into
runs/ and then replaces OUT/current with one atomic rename of a new link. A reader opening
OUT/worklist.parquet and OUT/run_summary.json sees the previous run's files or the new run's,
never a mix; a crash at any point leaves one or the other, and the store's commit comes before
(the worklist stage commits, then `publish` runs), so the files never show items the store lacks.

`clean_leftovers` (called by the next run, under its lock) removes what a crashed run left:
hidden temporary files and unfinished run folders of processes no longer alive. `prune` keeps
the published run and the `KEEP_RUNS - 1` before it, and removes stage folders of other
intervals that nothing has touched for `STAGE_IDLE_S`. Every folder made here is owner-only.
"""
from __future__ import annotations

import os
import re
import secrets
import shutil
import time
from pathlib import Path

from cardiosieve.pipeline.files import private_dir

RUNS_DIR, CURRENT, GATE_STOPPED, STAGE_DIR = "runs", "current", "gate_stopped", "_stage"
BUILDING_PREFIX = ".building-"
_OWNER = re.compile(r"(?:^\.building-|\.)(\d+)-[0-9a-f]{8}(?:\.tmp|\.link)?$")
KEEP_RUNS = 3              # the published run and two before it, for a look back after a bad night
STAGE_IDLE_S = 3600        # another interval's stage folder untouched this long is a leftover


def published_names(screens) -> list[str]:
    """The file names every published run folder may hold (each has a link OUT/<name>)."""
    return ["worklist.parquet", "aligned.parquet", "rejects.parquet", "run_summary.json",
            "quality.json", "quality.html", *[f"criteria_{name}.parquet" for name in screens]]


def new_run_folder(out) -> Path:
    """An empty, hidden, owner-only folder under OUT/runs/ to build a run's outputs in."""
    runs = private_dir(Path(out) / RUNS_DIR)
    folder = runs / f"{BUILDING_PREFIX}{os.getpid()}-{secrets.token_hex(4)}"
    folder.mkdir(mode=0o700)
    os.chmod(folder, 0o700)
    return folder


def publish(out, building: Path, run_id: str, names: list[str]) -> Path:
    """Switch the run built in `building` in as OUT's published state (module docstring) and
    return its final folder."""
    from cardiosieve.pipeline.faults import fault_point

    out = Path(out)
    _fsync_dir(building)
    fault_point("before_switch")
    final = building.parent / f"{run_id}-{building.name.rsplit('-', 1)[-1]}"
    os.rename(building, final)
    _fsync_dir(final.parent)
    _replace_link(out / CURRENT, Path(RUNS_DIR) / final.name)
    for name in names:                    # stable paths; a regular file of an older layout goes
        link = out / name
        if not (link.is_symlink() and os.readlink(link) == str(Path(CURRENT) / name)):
            _replace_link(link, Path(CURRENT) / name)
    _fsync_dir(out)
    shutil.rmtree(out / GATE_STOPPED, ignore_errors=True)    # a later run has published
    return final


def current_run(out) -> Path | None:
    """The published run's folder, or None before the first publication."""
    link = Path(out) / CURRENT
    return link.resolve() if link.is_symlink() else None


def clean_leftovers(out) -> int:
    """Remove temporary files and unfinished run folders left by crashed runs (their process is
    gone); returns how many were removed. Call it under the run lock."""
    out = Path(out)
    removed = 0
    from cardiosieve.pipeline.archive import ARCHIVE_DIR

    candidates = [*out.glob(".*.tmp"), *out.glob(".*.link"), *out.glob(f"{STAGE_DIR}/*/.*.tmp"),
                  *out.glob(f"{RUNS_DIR}/*/.*.tmp"), *out.glob(f"{RUNS_DIR}/{BUILDING_PREFIX}*"),
                  *out.glob(f"{ARCHIVE_DIR}/*/.*.tmp"), *out.glob(f"{ARCHIVE_DIR}/{BUILDING_PREFIX}*")]
    for path in dict.fromkeys(candidates):
        if _owner_alive(path):
            continue
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path, ignore_errors=True)
        else:
            path.unlink(missing_ok=True)
        removed += 1
    return removed


def prune(out, keep_stage: list[Path]) -> None:
    """Keep the published run and the KEEP_RUNS - 1 published before it; remove the stage
    folders of other intervals idle for STAGE_IDLE_S (module docstring)."""
    out = Path(out)
    current = current_run(out)
    runs = sorted((p for p in (out / RUNS_DIR).glob("*") if p.is_dir() and not p.name.startswith(".")),
                  key=lambda p: p.stat().st_mtime)
    older = [p for p in runs if p != current]
    for p in older[:max(len(older) - (KEEP_RUNS - 1), 0)]:
        shutil.rmtree(p, ignore_errors=True)
    keep = {Path(p).resolve() for p in keep_stage}
    now = time.time()
    for d in (out / STAGE_DIR).glob("*"):
        if d.is_dir() and d.resolve() not in keep and now - _newest_mtime(d) > STAGE_IDLE_S:
            shutil.rmtree(d, ignore_errors=True)


def _newest_mtime(folder: Path) -> float:
    return max([folder.stat().st_mtime, *(p.stat().st_mtime for p in folder.iterdir())])


def _owner_alive(path: Path) -> bool:
    """Whether the process whose id is in a temporary name (".<name>.<pid>-<token>.tmp",
    ".building-<pid>-<token>") is still running."""
    m = _OWNER.search(path.name)
    if m is None:
        return False
    pid = int(m.group(1))
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:           # alive, another user's
        return True
    return True


def _replace_link(link: Path, target: Path) -> None:
    """Point `link` at `target` with one atomic rename of a new link over it."""
    tmp = link.with_name(f".{link.name}.{os.getpid()}-{secrets.token_hex(4)}.link")
    os.symlink(target, tmp)
    try:
        os.replace(tmp, link)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _fsync_dir(folder: Path) -> None:
    try:                                  # POSIX; not available everywhere
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        pass
