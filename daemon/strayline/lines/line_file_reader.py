"""The contract-version-1 reader as a reader plug-in: one HDF5 file per line.

The first reader of :mod:`strayline.lines.readers`; it serves ``*.h5`` (``watch.pattern``)
and reads with :func:`strayline.lines.read_line_file` (docs/line-file.md).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import h5py

from strayline.lines.readers import HandedOver, nothing_handed_over
from strayline.lines.scan_line import LineLimits, ScanLine, read_line_file

__all__ = ["LINE_FILE_READER", "LineFileReader", "check_line_file"]

_LIMITS = LineLimits()  # the default limits


def check_line_file(path: Path) -> str | None:
    """Check cheaply that a line file opens as HDF5 and carries the root ``format`` attribute.

    The file is opened read-only without HDF5 file locking (so a writer that reopens the
    file is never locked out by the check) and closed before returning.

    Returns
    -------
    str or None
        None when the file opens and has the attribute; otherwise what was wrong.
    """
    try:
        with h5py.File(path, "r", locking=False) as handle:
            if "format" not in handle.attrs:
                return f"{path.name}: root attribute 'format' is missing"
    except OSError as exc:
        return f"{path.name}: does not open as HDF5 ({exc})"
    return None


@dataclass(frozen=True)
class LineFileReader:
    """One HDF5 file per completed line, contract version 1 (docs/line-file.md)."""

    name: str = "line-file"
    patterns: tuple[str, ...] = ("*.h5",)
    growing: bool = False
    summary: str = "one HDF5 file per completed line (contract v1, docs/line-file.md)"

    def check(self, path: Path) -> str | None:
        return check_line_file(path)

    def read(
        self,
        path: Path,
        *,
        limits: LineLimits = _LIMITS,
        handed_over: HandedOver = nothing_handed_over,
    ) -> Iterator[ScanLine]:
        yield read_line_file(path, limits=limits)


#: The reader registered as ``line-file``.
LINE_FILE_READER = LineFileReader()
