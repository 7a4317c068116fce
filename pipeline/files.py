"""Publishing files: a temporary file beside the target, fsync, then os.replace.

Readers see the old file or the new one, never half of one; a crash or an error leaves the
previous file as it was and no temporary file behind. Every file the run publishes (stage
files, worklist, aligned table, rejects, run summary, quality report, export) goes through
`write_atomic`. A published file gets the permissions an ordinary open() would give it (the
process umask). Standard library only.
"""
from __future__ import annotations

import json
import os
import secrets
from pathlib import Path
from typing import Any, Callable


def write_atomic(path, write: Callable[[Path], Any]) -> Path:
    """Publish `path`: `write(tmp)` writes the content to a temporary path in the same folder
    (the folder must exist), which is then flushed to disk and renamed over `path`. On any
    failure the temporary file is removed and `path` is left as it was."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.tmp")
    os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))   # mode: the umask's
    try:
        write(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    try:   # make the rename itself durable (POSIX); not available everywhere
        dir_fd = os.open(path.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
    except OSError:
        pass
    return path


def write_parquet_atomic(df, path) -> Path:
    """A DataFrame as Parquet (no index; df.attrs travel in the file's metadata)."""
    return write_atomic(path, lambda tmp: df.to_parquet(tmp, index=False))


def write_text_atomic(text: str, path) -> Path:
    """Text as UTF-8, written exactly as given (no newline translation)."""
    def write(tmp: Path) -> None:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
    return write_atomic(path, write)


def write_json_atomic(obj, path) -> Path:
    """A summary dict as indented JSON with sorted keys; values JSON lacks are written as str."""
    return write_text_atomic(json.dumps(obj, indent=2, sort_keys=True, default=str), path)
