"""Which paths under the watch root are scan-line files, and a listing of them.

Private helpers of :mod:`strayline.watch`: the name rules (pure string checks, cheap
enough for watchdog's event thread: the reader of each scan folder and the file names it
serves) and the one function that walks the tree.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from strayline.lines import LINE_FILE_READER, LineReader, ReaderChoice, is_temporary_name

__all__ = ["IGNORED_FOLDERS", "LineNames", "TreeListing", "list_tree"]

IGNORED_FOLDERS = frozenset({"_quarantine", "_truth"})
"""Folder names whose contents are never lines to process (anywhere below the root)."""


class LineNames:
    """Decides from the path alone whether a file or folder under the root matters.

    Parameters
    ----------
    root : Path
        The watch root (absolute).
    pattern : str
        Glob matched against the trailing components of the path relative to the root,
        e.g. ``"*.h5"`` (the file name) or ``"scan_*/line_*.h5"`` (folder and name). A
        leading ``**/`` is accepted and ignored, so watchdog-style patterns work too.
        The pattern of the contract-v1 reader when ``readers`` is not given.
    readers : ReaderChoice, optional
        The reader of each scan folder, whose patterns then decide (default: the
        contract-v1 reader everywhere, with ``pattern``).
    """

    def __init__(
        self, root: Path, pattern: str = "*.h5", *, readers: ReaderChoice | None = None
    ) -> None:
        self._root = root
        self.readers = (
            readers if readers is not None else ReaderChoice.single(LINE_FILE_READER, [pattern])
        )

    def _relative_parts(self, path: Path) -> tuple[str, ...] | None:
        try:
            parts = path.relative_to(self._root).parts
        except ValueError:
            return None
        if any(part in IGNORED_FOLDERS for part in parts):
            return None
        return parts

    def reader_of(self, path: Path) -> LineReader | None:
        """The reader of a file path that may hold scan lines, else None."""
        parts = self._relative_parts(path)
        if not parts or is_temporary_name(parts[-1]):
            return None
        return self.readers.serving(PurePosixPath(*parts))

    def is_line(self, path: Path) -> bool:
        """True for a file path that may hold completed scan lines."""
        return self.reader_of(path) is not None

    def is_growing(self, path: Path) -> bool:
        """True for a file that grows line by line (its reader says so)."""
        reader = self.reader_of(path)
        return reader is not None and reader.growing

    def check(self, path: Path) -> str | None:
        """The probe of a file: its reader's cheap check (None: ready to read)."""
        reader = self.reader_of(path)
        if reader is None:
            return f"{path.name}: no reader serves this name in its folder"
        return reader.check(path)

    def is_watched_folder(self, path: Path) -> bool:
        """True for a folder at or below the root that is not an ignored folder."""
        return self._relative_parts(path) is not None


@dataclass(frozen=True)
class TreeListing:
    """What one walk of a folder found.

    Attributes
    ----------
    files : dict[Path, tuple[int, int]]
        Line files found, each with its (size in bytes, mtime in ns).
    error : str or None
        The first problem that kept the walk from being complete (folder missing or
        unreadable); None when every folder was read.
    """

    files: dict[Path, tuple[int, int]]
    error: str | None


def list_tree(top: Path, names: LineNames) -> TreeListing:
    """Walk ``top`` recursively and list the line files below it with their signatures.

    Ignored folders are not entered; symlinked folders are not followed (no loops).
    A file that vanishes during the walk is skipped silently; a folder that cannot be
    read makes the listing incomplete (``error`` says which and why).
    """
    files: dict[Path, tuple[int, int]] = {}
    error: str | None = None
    stack = [top]
    while stack:
        folder = stack.pop()
        try:
            with os.scandir(folder) as entries:
                for entry in entries:
                    path = folder / entry.name
                    try:
                        if entry.is_dir(follow_symlinks=False):
                            if names.is_watched_folder(path):
                                stack.append(path)
                        elif names.is_line(path) and entry.is_file():
                            st = entry.stat()
                            files[path] = (st.st_size, st.st_mtime_ns)
                    except FileNotFoundError:
                        continue
        except FileNotFoundError as exc:
            if folder == top and error is None:  # a sub-folder removed mid-walk is no loss
                error = f"cannot list {folder}: {exc.strerror or exc}"
        except OSError as exc:
            if error is None:
                error = f"cannot list {folder}: {exc.strerror or exc}"
    return TreeListing(files=files, error=error)
