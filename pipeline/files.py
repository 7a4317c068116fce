"""Publishing files: a temporary file beside the target, fsync, then os.replace.

Readers see the old file or the new one, never half of one; a crash or an error leaves the
previous file as it was and no temporary file behind. Every file the run publishes (stage
files, worklist, aligned table, rejects, run summary, quality report, export) goes through
`write_atomic`.

Privacy: these files name patients and hold their values, so each is owner-only (0600) whatever
the process umask, and `private_dir` makes the folders they live in owner-only (0700). os.open's
and mkdir's mode is masked by the umask, hence the explicit chmod after each. Standard library only.
"""
from __future__ import annotations

import errno
import json
import os
import secrets
from pathlib import Path
from typing import Any, Callable

PRIVATE_FILE_MODE = 0o600   # owner read and write: files holding patient identifiers or values
PRIVATE_DIR_MODE = 0o700    # owner only: the folders they are written in


def private_dir(path) -> Path:
    """The folder `path`, made if missing (parents too) and owner-only (PRIVATE_DIR_MODE) whatever
    the umask. Every folder made here is chmod-ed, and so is `path` itself when it already
    existed and belongs to this user; folders that existed above it (/tmp, a home folder, a
    shared mount) are left as their owners set them. Returns `path`."""
    path = Path(path)
    missing = []
    for folder in (path, *path.parents):
        if folder.exists():
            break
        missing.append(folder)
    for folder in reversed(missing):          # top down
        try:
            folder.mkdir(mode=PRIVATE_DIR_MODE)
        except FileExistsError:               # another process made it meanwhile: its maker's
            continue
        os.chmod(folder, PRIVATE_DIR_MODE)
    if not path.is_dir():                     # as mkdir(exist_ok=True) would say
        raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(path))
    if path.stat().st_uid == os.geteuid():    # another user's folder is theirs to set
        os.chmod(path, PRIVATE_DIR_MODE)
    return path


def write_atomic(path, write: Callable[[Path], Any]) -> Path:
    """Publish `path`: `write(tmp)` writes the content to a temporary path in the same folder
    (the folder must exist), which is then flushed to disk and renamed over `path`. On any
    failure the temporary file is removed and `path` is left as it was. The file is owner-only
    (PRIVATE_FILE_MODE) from its creation on, whatever the umask."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, PRIVATE_FILE_MODE)
    try:
        try:   # the umask can only take bits away (0277 would leave 0400): set exactly 0600
            os.fchmod(fd, PRIVATE_FILE_MODE)
        finally:
            os.close(fd)
        write(tmp)
        os.chmod(tmp, PRIVATE_FILE_MODE)     # in case `write` replaced the file rather than filling it
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
