"""One run at a time per output folder and per worklist store.

`run_lock` holds, for the whole run, an advisory file lock on OUT/.cardiosieve-run.lock, one on
<sqlite file>.lock when the store is a SQLite file elsewhere, and a PostgreSQL session advisory
lock when the store is PostgreSQL. A second run on the same OUT or store does not wait: it stops
with RunLockError (exit 2, one line), before anything is read or written, so two overlapping
runs can never publish two items for one episode. The locks go with the process, so a crashed
run leaves none behind.
"""
from __future__ import annotations

import fcntl
import hashlib
import os
from contextlib import ExitStack, contextmanager
from pathlib import Path
from typing import Iterator

from cardiosieve.pipeline.errors import BadInputError

LOCK_NAME = ".cardiosieve-run.lock"
# The PostgreSQL advisory lock key: a fixed 64-bit number of cardiosieve's own.
PG_LOCK_KEY = int.from_bytes(hashlib.sha1(b"cardiosieve nightly run").digest()[:8], "big", signed=True)


class RunLockError(BadInputError):
    """Another run holds the lock on this output folder or store."""


def _file_lock(path: Path, stack: ExitStack) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    # Created owner-only, like every file cardiosieve writes (pipeline/files.py), whatever the umask.
    fh = stack.enter_context(os.fdopen(os.open(path, os.O_RDWR | os.O_CREAT, 0o600), "r+"))
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        raise RunLockError(f"another cardiosieve run holds {path}; wait for it to end, then rerun") from None
    stack.callback(fcntl.flock, fh.fileno(), fcntl.LOCK_UN)


def _pg_lock(url: str, stack: ExitStack) -> None:
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    stack.callback(engine.dispose)
    conn = stack.enter_context(engine.connect())
    if not conn.execute(text("SELECT pg_try_advisory_lock(:k)"), {"k": PG_LOCK_KEY}).scalar():
        raise RunLockError("another cardiosieve run holds the worklist database's run lock; wait for it to end, "
                           "then rerun")
    conn.commit()
    stack.callback(lambda: (conn.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": PG_LOCK_KEY}), conn.commit()))


@contextmanager
def run_lock(out, db_url: str) -> Iterator[None]:
    """Hold the run's locks (module docstring) for the duration of the block."""
    with ExitStack() as stack:
        out_lock = (Path(out) / LOCK_NAME).resolve()
        _file_lock(out_lock, stack)
        if db_url.startswith("sqlite:///") and db_url != "sqlite:///:memory:":
            db_lock = Path(db_url[len("sqlite:///"):] + ".lock").resolve()
            if db_lock.parent != out_lock.parent:
                _file_lock(db_lock, stack)
        elif db_url.startswith("postgresql"):
            _pg_lock(db_url, stack)
        yield
