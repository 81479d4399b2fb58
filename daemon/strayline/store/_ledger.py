"""The scan store's ledger: an append-only, fsync'd JSON-lines record of line commits.

Why a JSON-lines file and not a zarr attribute
----------------------------------------------
A commit must be durable the moment :meth:`Ledger.append` returns and must cost the same
for line 1 and line 1000. Appending one short record to a file and calling ``fsync`` does
both; rewriting a growing attribute document (``zarr.json``) on every line costs O(lines)
per commit and zarr's local store does not fsync it. An append can only be torn at the end
of the file (a crash during ``write``): :func:`parse_records` drops an unfinished or
unparsable *last* line, and :meth:`Ledger.open` truncates it away before appending again.
Damage anywhere else is corruption and is reported, never guessed around.

The file lives at ``<store>/ledger/records.jsonl``, inside the directory of a zero-length
zarr array named ``ledger`` (its attributes describe the file). zarr never lists the
inside of an array's directory, so the file does not disturb group listings, while it
travels with the store when the ``.zarr`` directory is copied.

Record events
-------------
``begin``  written and fsync'd *before* any row of a line is touched (write-ahead intent).
``commit`` written and fsync'd *after* every row of the line is written (and fsync'd).
``reset``  written after the rows of a line that began but never committed were reset to
           fill values at open.

Lines written together (a group commit: every line ready at that moment, one ``begin``
append and one ``commit`` append, each fsync'd once) carry the same ``group`` number in
their commit records: the commit count before the group. A commit without one (written
alone, or by an older version) is a group of its own.

A line whose last event is ``begin`` is pending: its rows may be half-written, and the
store resets them at open. Replaying the records in order gives the committed entries and,
for each line, the earlier versions it superseded.
"""

from __future__ import annotations

import fcntl
import json
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from strayline.errors import StoreError

__all__ = [
    "LEDGER_FILE",
    "Key",
    "Ledger",
    "LedgerEntry",
    "LedgerState",
    "format_time",
    "parse_records",
    "parse_time",
    "read_ledger_state",
]

Key = tuple[int, str]  # (line_index, direction)

_EVENTS = ("begin", "commit", "reset")


def format_time(moment: datetime) -> str:
    """Format an aware datetime as ISO 8601 UTC with a ``Z`` suffix, microseconds kept."""
    if moment.tzinfo is None:
        raise ValueError(f"time must be timezone-aware; found naive {moment!r}")
    text = moment.astimezone(UTC).isoformat(timespec="microseconds")
    return text.removesuffix("+00:00") + "Z"


def parse_time(text: str) -> datetime:
    """Parse a time written by :func:`format_time` back into an aware UTC datetime."""
    return datetime.fromisoformat(text).astimezone(UTC)


@dataclass(frozen=True)
class LedgerEntry:
    """One committed version of a line.

    Attributes
    ----------
    line_index : int
        Index along the slow axis.
    direction : str
        ``"forward"`` or ``"backward"``.
    source : str
        Path of the line file the rows came from.
    sha256 : str or None
        Hex SHA-256 of that file (None when the line was not read from disk).
    processed_time : datetime
        When the commit was made, aware UTC.
    software_version : str
        ``strayline.__version__`` of the writer.
    config_digest : str
        Digest of the configuration the writer ran with.
    superseded : tuple of LedgerEntry
        Earlier versions of the same line, oldest first (their ``superseded`` is empty).
    """

    line_index: int
    direction: str
    source: str
    sha256: str | None
    processed_time: datetime
    software_version: str
    config_digest: str
    superseded: tuple[LedgerEntry, ...] = ()

    @property
    def key(self) -> Key:
        return (self.line_index, self.direction)


@dataclass
class LedgerState:
    """The ledger replayed: committed entries, superseded versions, pending lines.

    Applying the same records in the same order always gives the same state, so the
    running store and a store reopened after a crash agree.
    """

    committed: dict[Key, LedgerEntry] = field(default_factory=dict)
    history: dict[Key, list[LedgerEntry]] = field(default_factory=dict)
    pending: dict[Key, Mapping[str, Any]] = field(default_factory=dict)
    last_commit_time: datetime | None = None
    commit_count: int = 0  # commit records so far, superseding ones included
    last_committed: Key | None = None  # the line of the latest commit record
    last_group: tuple[Key, ...] = ()  # the lines of the latest group commit, in order
    _group: int | None = None  # the ``group`` number of the latest commit record

    def apply(self, record: Mapping[str, Any]) -> None:
        """Fold one record into the state."""
        key: Key = (int(record["line_index"]), str(record["direction"]))
        event = record["event"]
        if event == "begin":
            # The rows of the committed version are about to be overwritten: from here on
            # that version survives only as history.
            self._retire(key)
            self.pending[key] = record
        elif event == "commit":
            self.pending.pop(key, None)
            self._retire(key)
            processed = parse_time(record["processed_time"])
            self.committed[key] = LedgerEntry(
                line_index=key[0],
                direction=key[1],
                source=str(record["source"]),
                sha256=record["sha256"],
                processed_time=processed,
                software_version=str(record["software_version"]),
                config_digest=str(record["config_digest"]),
                superseded=tuple(self.history.get(key, ())),
            )
            if self.last_commit_time is None or processed > self.last_commit_time:
                self.last_commit_time = processed
            group = record.get("group")
            if group is None or group != self._group:
                self.last_group = ()
            self.last_group += (key,)
            self._group = group
            self.commit_count += 1
            self.last_committed = key
        elif event == "reset":
            self.pending.pop(key, None)
            self._retire(key)
        else:  # parse_records admits only known events
            raise ValueError(f"unknown ledger event {event!r}")

    def _retire(self, key: Key) -> None:
        old = self.committed.pop(key, None)
        if old is not None:
            self.history.setdefault(key, []).append(replace(old, superseded=()))


def _valid_record(obj: object) -> bool:
    if not isinstance(obj, dict) or obj.get("event") not in _EVENTS:
        return False
    if not isinstance(obj.get("line_index"), int) or obj.get("direction") not in (
        "forward",
        "backward",
    ):
        return False
    if obj["event"] == "commit":
        needed = ("source", "sha256", "processed_time", "software_version", "config_digest")
        if any(name not in obj for name in needed):
            return False
        try:
            parse_time(obj["processed_time"])
        except (TypeError, ValueError):
            return False
    return True


def parse_records(data: bytes, path: str | os.PathLike[str]) -> tuple[list[dict[str, Any]], int]:
    """Parse ledger bytes into records, tolerating a torn tail.

    Parameters
    ----------
    data : bytes
        The whole ledger file.
    path : path-like
        The file's path, for messages.

    Returns
    -------
    records : list of dict
        The valid records in file order.
    good_length : int
        Length in bytes of the valid prefix; everything after it is a torn tail.

    Raises
    ------
    StoreError
        If an invalid line is followed by a valid one (damage in the middle of the file).
    """
    records: list[dict[str, Any]] = []
    good_length = 0
    offset = 0
    first_bad: tuple[int, bytes] | None = None
    for number, raw in enumerate(data.split(b"\n"), start=1):
        end = offset + len(raw) + 1  # + the newline
        complete = end <= len(data)
        obj: object = None
        if complete and raw.strip():
            try:
                obj = json.loads(raw)
            except (UnicodeDecodeError, json.JSONDecodeError):
                obj = None
        blank = not raw.strip()  # a complete blank line carries nothing
        ok = complete and (blank or _valid_record(obj))
        if ok:
            if first_bad is not None:
                bad_number, bad_raw = first_bad
                raise StoreError(
                    f"{path}: ledger line {bad_number} must be a JSON record with an event "
                    f"in {_EVENTS}; found {bad_raw[:80]!r} followed by valid records"
                )
            if raw.strip():
                records.append(obj)  # type: ignore[arg-type]
            good_length = end
        elif first_bad is None and raw:
            first_bad = (number, raw)
        offset = end
    return records, good_length


class Ledger:
    """The open ledger file: holds an exclusive lock, appends durable records.

    Use :meth:`open`; the constructor takes an already-open descriptor.
    """

    def __init__(self, path: Path, fd: int, state: LedgerState, torn_bytes: int) -> None:
        self.path = path
        self._fd = fd
        self.state = state
        self.torn_bytes = torn_bytes

    @classmethod
    def open(cls, path: Path) -> Ledger:
        """Open (creating if missing), lock, replay, and cut a torn tail off the file.

        Raises
        ------
        StoreError
            If the file cannot be opened, another process holds it, or it is damaged.
        """
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o644)
        except OSError as exc:
            raise StoreError(f"{path}: cannot open the ledger: {exc.strerror}") from exc
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError as exc:
                raise StoreError(
                    f"{path}: the store is in use by another writer (ledger lock held)"
                ) from exc
            size = os.fstat(fd).st_size
            data = os.pread(fd, size, 0) if size else b""
            records, good_length = parse_records(data, path)
            torn = len(data) - good_length
            if torn:
                os.ftruncate(fd, good_length)
                os.fsync(fd)
            state = LedgerState()
            for record in records:
                state.apply(record)
        except OSError as exc:
            os.close(fd)
            if isinstance(exc, StoreError):
                raise
            raise StoreError(f"{path}: cannot read the ledger: {exc}") from exc
        except BaseException:
            os.close(fd)
            raise
        return cls(path, fd, state, torn)

    def append(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Write records durably (one ``write`` then ``fsync``), then apply them to state.

        Raises
        ------
        StoreError
            If the write or the fsync fails; the state is left unchanged.
        """
        batch = list(records)
        payload = b"".join(
            json.dumps(record, separators=(",", ":"), sort_keys=True).encode() + b"\n"
            for record in batch
        )
        try:
            self._check_still_there()
            written = os.write(self._fd, payload)
            if written != len(payload):
                raise OSError(f"short write: {written} of {len(payload)} bytes")
            os.fsync(self._fd)
        except OSError as exc:
            raise StoreError(f"{self.path}: appending to the ledger failed: {exc}") from exc
        for record in batch:
            self.state.apply(record)

    def _check_still_there(self) -> None:
        """Refuse to append to a ledger whose file was deleted or replaced (the store's
        folder removed while open): the records would land nowhere anyone reads."""
        mine = os.fstat(self._fd)
        try:
            theirs = os.stat(self.path)
        except FileNotFoundError:
            raise OSError(f"the ledger file is gone from {self.path}") from None
        if mine.st_nlink == 0 or (mine.st_dev, mine.st_ino) != (theirs.st_dev, theirs.st_ino):
            raise OSError(f"the ledger file at {self.path} was replaced")

    @property
    def closed(self) -> bool:
        return self._fd < 0

    def close(self) -> None:
        """Release the lock and the descriptor (idempotent)."""
        if self._fd >= 0:
            fd, self._fd = self._fd, -1
            os.close(fd)


LEDGER_FILE = Path("ledger") / "records.jsonl"
"""Where the ledger lives inside a store."""


def read_ledger_state(store_path: Path) -> LedgerState:
    """Replay a store's ledger without taking its lock (safe while the daemon writes).

    A missing ledger is an empty one; a torn last record is ignored.

    Raises
    ------
    StoreError
        If the ledger exists but cannot be read, or is damaged before its end.
    """
    ledger_file = Path(store_path) / LEDGER_FILE
    try:
        data = ledger_file.read_bytes()
    except FileNotFoundError:
        data = b""
    except OSError as error:
        raise StoreError(f"{ledger_file}: cannot read the ledger: {error}") from error
    state = LedgerState()
    for record in parse_records(data, ledger_file)[0]:
        state.apply(record)
    return state
