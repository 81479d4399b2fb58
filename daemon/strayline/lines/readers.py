"""Readers: how the files of a scan folder become validated line records.

A *reader* knows one layout of files. It says which file names it serves (``patterns``),
checks cheaply whether a file is one of its own and complete enough to read (``check``, the
watcher's probe) and reads a file into :class:`~strayline.lines.ScanLine` records
(``read``): one per file for the one-file-per-line layouts, the completed lines not yet
handed over for a file that grows line by line. Everything downstream (quarantine, ledger,
dedupe by checksum, products) is the same whatever the reader.

Readers are found through the entry-point group :data:`READER_GROUP` (``strayline.readers``):
each entry point names a reader object. The readers built into strayline are registered
there too (pyproject.toml) and are always known, even from a source checkout whose installed
metadata is older. The config picks a reader per scan folder (``readers``), and
``strayline check-config`` lists the installed ones. The interface is documented for
plug-in authors in docs/readers.md.
"""

from __future__ import annotations

import fnmatch
import functools
from collections.abc import Callable, Container, Iterator, Mapping, Sequence
from dataclasses import dataclass
from importlib.metadata import entry_points
from pathlib import Path, PurePosixPath
from typing import Protocol, runtime_checkable

from strayline.lines.scan_line import LineLimits, ScanLine

__all__ = [
    "READER_GROUP",
    "HandedOver",
    "InstalledReaders",
    "LineReader",
    "ReaderChoice",
    "built_in_readers",
    "installed_readers",
    "nothing_handed_over",
]

#: The entry-point group readers are registered under.
READER_GROUP = "strayline.readers"

HandedOver = Callable[[str], Container[tuple[int, str]]]
"""``handed_over(scan_id)``: the (line_index, direction) pairs of a scan the daemon already
has. A reader of a growing file skips them without reading their rows; a reader of one file
per line may ignore it (a line read again is recognised by its checksum)."""


def nothing_handed_over(scan_id: str) -> Container[tuple[int, str]]:
    """No line of any scan handed over yet (a first read)."""
    return ()


@runtime_checkable
class LineReader(Protocol):
    """What a reader offers (docs/readers.md).

    Attributes
    ----------
    name : str
        The name the config selects it by (``readers.default``, ``readers.rules[].reader``).
    patterns : tuple of str
        Globs of the file names it serves (``"*.h5"``), matched against the end of the path
        below the watch root, like ``watch.pattern``.
    growing : bool
        True when one file holds many lines and grows while it is written: the watcher
        hands it over again whenever it changed, never gives up on it as "still changing",
        and a malformed one holds its scan with an alert instead of being quarantined.
    summary : str
        One line for ``strayline check-config``.
    """

    @property
    def name(self) -> str: ...

    @property
    def patterns(self) -> tuple[str, ...]: ...

    @property
    def growing(self) -> bool: ...

    @property
    def summary(self) -> str: ...

    def check(self, path: Path) -> str | None:
        """Cheap look at a file (open it, look at a marker): None when it is one of this
        reader's and ready to read, else what is wrong. Must not hold the file open, nor
        lock it against its writer."""
        ...

    def read(
        self, path: Path, *, limits: LineLimits, handed_over: HandedOver
    ) -> Iterator[ScanLine]:
        """The validated lines of ``path`` not yet handed over, in acquisition order.

        Raises
        ------
        LineFileError
            The file breaks its layout's rules (raised after the good lines before it).
        OSError
            The file cannot be read now (FileNotFoundError: it is gone).
        """
        ...


def built_in_readers() -> dict[str, LineReader]:
    """The readers that come with strayline, by name."""
    from strayline.lines.growing_file import GROWING_FILE_READER
    from strayline.lines.line_file_reader import LINE_FILE_READER
    from strayline.lines.plain_arrays import PLAIN_ARRAYS_READER

    readers: list[LineReader] = [LINE_FILE_READER, GROWING_FILE_READER, PLAIN_ARRAYS_READER]
    return {reader.name: reader for reader in readers}


@dataclass(frozen=True)
class InstalledReaders:
    """The readers found, and the entry points that could not be used.

    Attributes
    ----------
    readers : mapping of str to LineReader
        By name, built-in ones first.
    origins : mapping of str to str
        Where each came from: ``"built in"`` or ``"<distribution> <version>"``.
    problems : tuple of str
        One message per entry point that failed to load, is not a reader, or claims a
        name already taken.
    """

    readers: Mapping[str, LineReader]
    origins: Mapping[str, str]
    problems: tuple[str, ...] = ()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(sorted(self.readers))


@functools.cache
def installed_readers() -> InstalledReaders:
    """The built-in readers and those registered in :data:`READER_GROUP` (found once per
    process; ``installed_readers.cache_clear()`` looks again)."""
    readers = built_in_readers()
    origins = dict.fromkeys(readers, "built in")
    problems: list[str] = []
    for point in entry_points(group=READER_GROUP):
        dist = point.dist
        origin = f"{dist.name} {dist.version}" if dist is not None else "an unknown package"
        try:
            reader = point.load()
        except Exception as error:  # a broken plug-in must not stop the daemon's others
            problems.append(
                f"reader {point.name!r} of {origin} ({point.value}) does not load: "
                f"{type(error).__name__}: {error}"
            )
            continue
        if point.name in readers:
            if readers[point.name] is not reader:
                problems.append(
                    f"reader {point.name!r} of {origin} is ignored: the name is taken by the "
                    f"reader {origins[point.name]}"
                )
            continue
        if not isinstance(reader, LineReader) or reader.name != point.name:
            problems.append(
                f"entry point {point.name!r} of {origin} ({point.value}) is not a reader named "
                f"{point.name!r} (it needs name, patterns, growing, summary, check and read)"
            )
            continue
        readers[point.name] = reader
        origins[point.name] = origin
    return InstalledReaders(readers, origins, tuple(problems))


@dataclass(frozen=True)
class ReaderChoice:
    """Which reader reads the files of each scan folder.

    Parameters
    ----------
    rules : sequence of (folder_glob, reader)
        The first rule whose glob (shell-style, case-sensitive) matches the scan folder's
        name picks its reader.
    default : LineReader
        The reader of folders no rule matches.
    patterns : mapping of str to tuple of str
        File-name patterns that replace a reader's own, by reader name (``watch.pattern``
        for the contract-version-1 reader).
    """

    rules: tuple[tuple[str, LineReader], ...]
    default: LineReader
    patterns: Mapping[str, tuple[str, ...]]

    @classmethod
    def single(cls, reader: LineReader, patterns: Sequence[str] | None = None) -> ReaderChoice:
        """One reader for every folder (its own patterns, or ``patterns``)."""
        return cls((), reader, {} if patterns is None else {reader.name: tuple(patterns)})

    def for_folder(self, folder_name: str) -> LineReader:
        """The reader of a scan folder, by the folder's name."""
        for glob, reader in self.rules:
            if fnmatch.fnmatchcase(folder_name, glob):
                return reader
        return self.default

    def patterns_of(self, reader: LineReader) -> tuple[str, ...]:
        """The file-name patterns ``reader`` serves here."""
        return self.patterns.get(reader.name, reader.patterns)

    def serving(self, relative: PurePosixPath) -> LineReader | None:
        """The reader of a file (its path below the watch root), or None when the reader of
        its folder does not serve its name."""
        folder = relative.parent.name
        reader = self.for_folder(folder)
        if any(relative.match(_strip_recursive(p)) for p in self.patterns_of(reader)):
            return reader
        return None

    def readers(self) -> tuple[LineReader, ...]:
        """Every reader in use, the default first."""
        found = {self.default.name: self.default}
        for _, reader in self.rules:
            found.setdefault(reader.name, reader)
        return tuple(found.values())


def _strip_recursive(pattern: str) -> str:
    """Drop leading ``**/`` segments: a line may sit at any depth anyway."""
    while pattern.startswith("**/"):
        pattern = pattern[3:]
    return pattern
