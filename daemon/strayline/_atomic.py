"""Atomic file writes: a reader sees the old file or the whole new one, never a part.

The bytes go to a temporary name in the same folder (``.<name>.<random>.tmp``, which the
watcher ignores), are flushed and fsync'd, then renamed over the target with
``os.replace`` (atomic on POSIX within one file system) and the folder is fsync'd so the
rename itself survives a power cut. On any failure the temporary file is removed.
"""

from __future__ import annotations

import errno
import os
import secrets
from contextlib import suppress
from pathlib import Path

__all__ = ["fsync_dir", "write_bytes_atomic", "write_text_atomic"]


def fsync_dir(folder: str | os.PathLike[str]) -> None:
    """Make a folder's entries (a rename, a new file) durable.

    Folders that cannot be fsync'd (some network or Windows file systems) are skipped:
    the file's own bytes were already fsync'd.
    """
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError as exc:
        if exc.errno in (errno.EACCES, errno.EISDIR, errno.EINVAL):
            return
        raise
    try:
        os.fsync(fd)
    except OSError as exc:
        if exc.errno not in (errno.EINVAL, errno.ENOTSUP, errno.EBADF):
            raise
    finally:
        os.close(fd)


def write_bytes_atomic(path: str | os.PathLike[str], data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically and durably; return the path."""
    target = Path(path)
    temporary = target.with_name(f".{target.name}.{secrets.token_hex(6)}.tmp")
    fd = os.open(
        temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666
    )
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, target)
    except BaseException:
        with suppress(FileNotFoundError):
            os.unlink(temporary)
        raise
    fsync_dir(target.parent)
    return target


def write_text_atomic(path: str | os.PathLike[str], text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically and durably; return the path."""
    return write_bytes_atomic(path, text.encode("utf-8"))
