"""The watcher: turns files appearing under the watch root into ready line files.

The instrument writes ``<watch_root>/<scan folder>/<one HDF5 file per completed line>``.
:class:`LineWatcher` reports each such file once it is complete, whatever the writer and
the file system do:

- **events** (``mode="native"``): a recursive watchdog observer (inotify on Linux)
  records hints about paths; it never decides anything on its own thread;
- **polling** (``mode="polling"``, for network shares where inotify sees nothing): the
  tree is listed every ``poll_interval_s``; the same listing is used in native mode while
  the observer cannot be armed (watch root missing, inotify limits);
- **catch-up**: the tree is listed as soon as the watcher is armed, so lines written while
  the daemon was down are found;
- **reconciliation**: in native mode the tree is listed again every
  ``reconcile_interval_s``, which catches files whose events were lost (queue overflow);
- **readiness**: a file is ready when its (size, mtime) stayed unchanged for ``settle_s``
  and the probe says it opens cleanly; one that is still not ready ``give_up_s`` after it
  was first seen is reported as given up, with the reason.

Time comes from an injected monotonic clock, so tests drive the debounce without
sleeping. ``wait_ready`` blocks on a :class:`threading.Event` for at most its timeout,
measured in real seconds.
"""

from __future__ import annotations

import math
import os
import stat
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Protocol

from watchdog.events import (
    DirCreatedEvent,
    DirMovedEvent,
    FileClosedEvent,
    FileCreatedEvent,
    FileDeletedEvent,
    FileModifiedEvent,
    FileMovedEvent,
    FileSystemEvent,
    FileSystemEventHandler,
)
from watchdog.observers import Observer

from strayline.lines import ReaderChoice, check_line_file
from strayline.watch._candidates import Candidates, ReadyFile, Signature
from strayline.watch._tree import LineNames, list_tree

__all__ = [
    "LineWatcher",
    "Probe",
    "ReadyFile",
    "WatchOptions",
    "WatchStatistics",
    "default_probe",
]

Probe = Callable[[Path], str | None]
"""``probe(path)`` returns None when the file opens and looks complete, else the error."""

# The events that can mean "a line file appeared or changed" (or a folder that may hold
# some). Opened / closed-without-write events are left out on purpose: the probe itself
# causes them, and reacting to them would loop.
_EVENT_KINDS: list[type[FileSystemEvent]] = [
    FileCreatedEvent,
    FileModifiedEvent,
    FileMovedEvent,
    FileClosedEvent,
    FileDeletedEvent,
    DirCreatedEvent,
    DirMovedEvent,
]


@dataclass(frozen=True)
class WatchOptions:
    """How the watcher finds and judges line files; settled once, at construction.

    Attributes
    ----------
    mode : {"native", "polling"}
        ``"native"``: file-system events plus periodic reconciliation. ``"polling"``:
        list the tree every ``poll_interval_s`` (network shares).
    poll_interval_s : float
        Polling period, s; also the listing period while native events are unavailable.
    settle_s : float
        Size and mtime must stay unchanged this long before a file is probed, s.
    give_up_s : float
        A candidate still not ready this long after it was first seen is given up, s.
    reconcile_interval_s : float
        Period of the full re-listing in native mode, s.
    pattern : str
        Glob for line files, matched against the end of the path below the root
        (``"*.h5"``: the file name; a leading ``**/`` is accepted).
    """

    mode: Literal["native", "polling"] = "native"
    poll_interval_s: float = 2.0
    settle_s: float = 0.5
    give_up_s: float = 600.0
    reconcile_interval_s: float = 60.0
    pattern: str = "*.h5"

    def __post_init__(self) -> None:
        if self.mode not in ("native", "polling"):
            raise ValueError(
                f"WatchOptions.mode must be 'native' or 'polling'; found {self.mode!r}"
            )
        for name in ("poll_interval_s", "settle_s", "give_up_s", "reconcile_interval_s"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ValueError(
                    f"WatchOptions.{name} must be a finite number > 0 s; found {value!r}"
                )
        if self.give_up_s <= self.settle_s:
            raise ValueError(
                f"WatchOptions.give_up_s must be greater than settle_s ({self.settle_s:g} s);"
                f" found {self.give_up_s:g} s"
            )
        stripped = self.pattern.removeprefix("**/")
        if not stripped or self.pattern.startswith("/"):
            raise ValueError(
                "WatchOptions.pattern must be a relative glob such as '*.h5';"
                f" found {self.pattern!r}"
            )


@dataclass(frozen=True)
class WatchStatistics:
    """A snapshot of the watcher's state.

    Attributes
    ----------
    candidates_pending : int
        Files seen but not yet ready nor given up.
    ready_emitted : int
        Files reported ready since start.
    given_up : int
        Files reported given up since start.
    events_seen : int
        File-system events received from the observer (kinds the watcher reacts to).
    reconcile_scans : int
        Full listings of the tree done (catch-up, reconciliation and polling).
    last_event_s : float or None
        Injected-clock time of the last event received, s; None before the first.
    watch_root_present : bool
        Whether the watch root existed as a folder at the last look.
    observer_armed : bool
        Whether file-system events are being received (always False in polling mode).
    last_error : str or None
        The latest problem met while arming or listing (None when the last listing was
        complete and arming, if due, succeeded).
    """

    candidates_pending: int
    ready_emitted: int
    given_up: int
    events_seen: int
    reconcile_scans: int
    last_event_s: float | None
    watch_root_present: bool
    observer_armed: bool
    last_error: str | None


class _ObserverLike(Protocol):
    """The part of a watchdog observer the watcher uses."""

    def schedule(
        self,
        event_handler: FileSystemEventHandler,
        path: str,
        *,
        recursive: bool = ...,
        event_filter: list[type[FileSystemEvent]] | None = ...,
    ) -> object: ...

    def start(self) -> None: ...

    def stop(self) -> None: ...

    def join(self, timeout: float | None = ...) -> None: ...

    def is_alive(self) -> bool: ...


def default_probe(path: Path) -> str | None:
    """The contract-v1 reader's check: the file opens as HDF5 (read-only, without file
    locking, closed at once) and carries the root ``format`` attribute
    (:func:`strayline.lines.check_line_file`)."""
    return check_line_file(path)


def _signature_now(path: Path) -> Signature | None:
    """(size, mtime_ns) of a regular file now; None if it is gone or unreadable."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_size, st.st_mtime_ns) if stat.S_ISREG(st.st_mode) else None


class _EventRecorder(FileSystemEventHandler):
    """Forwards every observer event to the watcher (runs on watchdog's thread)."""

    def __init__(self, sink: Callable[[FileSystemEvent], None]) -> None:
        super().__init__()
        self._sink = sink

    def dispatch(self, event: FileSystemEvent) -> None:
        self._sink(event)


class LineWatcher:
    """Reports each complete scan-line file under a watch root exactly once.

    Parameters
    ----------
    watch_root : Path
        Folder the instrument writes scan folders into. It may not exist yet.
    options : WatchOptions
        Mode, timings and pattern.
    clock : callable returning float, optional
        Monotonic time in seconds; drives settle, give-up, polling and reconciliation.
    probe : callable, optional
        ``probe(path) -> str | None`` (default: the check of the file's reader).
    observer_factory : callable returning an observer, optional
        Builds the event observer in native mode (default: watchdog's platform
        observer). Tests pass a stand-in; ignored in polling mode.
    readers : ReaderChoice, optional
        The reader of each scan folder: which files are line files, which grow, and how
        each is probed (default: the contract-v1 reader with ``options.pattern``).

    Notes
    -----
    Observer callbacks only record hints (paths to look at) under the one lock. All
    decisions happen in :meth:`tick`, which the service drives through
    :meth:`wait_ready`.
    """

    def __init__(
        self,
        watch_root: Path,
        options: WatchOptions,
        *,
        clock: Callable[[], float] = time.monotonic,
        probe: Probe | None = None,
        observer_factory: Callable[[], _ObserverLike] | None = None,
        readers: ReaderChoice | None = None,
    ) -> None:
        self._root = Path(watch_root).absolute()
        self._options = options
        self._clock = clock
        self._names = LineNames(self._root, options.pattern, readers=readers)
        self._probe = probe if probe is not None else self._names.check
        self._uses_events = options.mode == "native"
        self._observer_factory: Callable[[], _ObserverLike] = observer_factory or Observer
        self._recorder = _EventRecorder(self._record_event)
        self._candidates = Candidates(
            settle_s=options.settle_s,
            give_up_s=options.give_up_s,
            probe_retry_s=max(options.settle_s, options.poll_interval_s),
        )
        self._lock = threading.Lock()  # guards everything below, shared with callbacks
        self._tick_lock = threading.Lock()  # one tick at a time
        self._wake = threading.Event()
        self._hinted_files: set[Path] = set()
        self._hinted_folders: set[Path] = set()
        self._ready: list[ReadyFile] = []
        self._observer: _ObserverLike | None = None
        self._armed_inode: int | None = None
        self._next_listing_s = -math.inf
        self._started = False
        self._stopped = False
        self._ready_emitted = 0
        self._given_up = 0
        self._events_seen = 0
        self._listings = 0
        self._last_event_s: float | None = None
        self._root_present = False
        self._last_error: str | None = None

    # -- life cycle ---------------------------------------------------------------------

    def start(self) -> None:
        """Arm the observer (native mode) and list everything already there (catch-up).

        A missing watch root is not an error: it is reported in :meth:`statistics` and
        arming is retried on every tick until the folder exists.
        """
        if self._started:
            return
        self._started = True
        self.tick()

    def stop(self) -> None:
        """Stop the observer and wake any waiter; the watcher cannot be restarted."""
        self._stopped = True
        self._disarm()
        self._wake.set()

    def __enter__(self) -> LineWatcher:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    # -- the consumer's side ------------------------------------------------------------

    def wait_ready(self, timeout_s: float) -> list[ReadyFile]:
        """Block up to ``timeout_s`` real seconds for newly ready files and return them.

        Returns early as soon as at least one file is ready or given up; returns an empty
        list on timeout or after :meth:`stop`. Files come sorted by (scan folder, mtime,
        name).
        """
        deadline = time.monotonic() + timeout_s
        while True:
            self._wake.clear()
            if not self._stopped:
                self.tick()
            found = self.ready_nowait()
            remaining = deadline - time.monotonic()
            if found or remaining <= 0 or self._stopped:
                return found
            self._wake.wait(min(remaining, self._nap_s()))

    def ready_nowait(self) -> list[ReadyFile]:
        """Return (and forget) the files judged so far, without looking at the disk."""
        with self._lock:
            found, self._ready = self._ready, []
        found.sort(key=lambda f: (str(f.path.parent), f.mtime_ns, f.path.name))
        return found

    def statistics(self) -> WatchStatistics:
        """A frozen snapshot of counters and health."""
        with self._lock:
            return WatchStatistics(
                candidates_pending=len(self._candidates),
                ready_emitted=self._ready_emitted,
                given_up=self._given_up,
                events_seen=self._events_seen,
                reconcile_scans=self._listings,
                last_event_s=self._last_event_s,
                watch_root_present=self._root_present,
                observer_armed=self._observer is not None,
                last_error=self._last_error,
            )

    # -- the one place where decisions are made ----------------------------------------

    def tick(self) -> None:
        """Look at the disk once: arm if needed, list if due, re-check and probe candidates.

        Raises
        ------
        RuntimeError
            If called before :meth:`start`.
        """
        if not self._started:
            raise RuntimeError("LineWatcher.tick() called before start()")
        with self._tick_lock:
            now_s = self._clock()
            self._check_root_and_arm()
            with self._lock:
                hinted_files, self._hinted_files = self._hinted_files, set()
                hinted_folders, self._hinted_folders = self._hinted_folders, set()

            seen: dict[Path, Signature] = {}
            if now_s >= self._next_listing_s:
                self._list_everything(now_s, seen)
            for folder in hinted_folders:
                seen.update(list_tree(folder, self._names).files)

            with self._lock:
                to_check = hinted_files | set(self._candidates.pending_paths())
            gone: list[Path] = []
            for path in to_check - seen.keys():
                try:
                    st = os.stat(path)
                except FileNotFoundError:
                    gone.append(path)
                    continue
                except OSError:
                    continue  # share briefly unreachable: look again next tick
                if stat.S_ISREG(st.st_mode):
                    seen[path] = (st.st_size, st.st_mtime_ns)

            with self._lock:
                for path in gone:
                    self._candidates.vanish(path)
                for path, (size_bytes, mtime_ns) in seen.items():
                    growing = self._names.is_growing(path)
                    self._candidates.observe(path, size_bytes, mtime_ns, now_s, growing=growing)
                due = self._candidates.due_for_probe(now_s)

            # Re-stat after each probe: a writer may have changed the file meanwhile (a
            # growing file changes all the time: its reader takes only committed rows).
            results = [
                (path, signature, self._run_probe(path), _signature_now(path))
                for path, signature in due
            ]

            with self._lock:
                for path, signature, error, after in results:
                    if after != signature and not (
                        after is not None and self._candidates.is_growing(path)
                    ):
                        if after is None:
                            self._candidates.vanish(path)
                        else:
                            self._candidates.observe(path, after[0], after[1], now_s)
                        continue
                    ready = self._candidates.record_probe(path, signature, error, now_s)
                    if ready is not None:
                        self._ready.append(ready)
                        self._ready_emitted += 1
                gave_up = self._candidates.expire(now_s)
                self._ready.extend(gave_up)
                self._given_up += len(gave_up)

    # -- helpers ------------------------------------------------------------------------

    def _run_probe(self, path: Path) -> str | None:
        try:
            return self._probe(path)
        except Exception as exc:  # a probe that raises is a failed probe, not a crash
            return f"{path.name}: probe raised {type(exc).__name__}: {exc}"

    def _list_everything(self, now_s: float, seen: dict[Path, Signature]) -> None:
        """Full listing (catch-up, reconciliation or polling); schedules the next one."""
        interval_s = (
            self._options.reconcile_interval_s
            if self._observer is not None
            else self._options.poll_interval_s
        )
        with self._lock:
            self._next_listing_s = now_s + interval_s
            if not self._root_present:
                return  # nothing to list; statistics already say why
        listing = list_tree(self._root, self._names)
        seen.update(listing.files)
        with self._lock:
            self._listings += 1
            if listing.error is not None:
                self._last_error = listing.error
                return
            self._candidates.forget_absent(set(listing.files))
            if self._observer is not None or not self._uses_events:
                self._last_error = None

    def _check_root_and_arm(self) -> None:
        """Track the root's presence; (re)arm the observer in native mode."""
        try:
            st = os.stat(self._root)
        except OSError:
            inode = None
        else:
            inode = st.st_ino if stat.S_ISDIR(st.st_mode) else None
        present = inode is not None
        with self._lock:
            self._root_present = present
            if not present:
                self._last_error = f"watch root {self._root} is missing or not a folder"
        if self._observer is not None and (
            inode != self._armed_inode or not self._observer.is_alive()
        ):
            self._disarm()  # root removed or replaced, or the observer died
        if self._stopped or not self._uses_events or not present or self._observer is not None:
            return
        try:
            observer = self._observer_factory()
            observer.schedule(
                self._recorder, str(self._root), recursive=True, event_filter=_EVENT_KINDS
            )
            observer.start()
        except OSError as exc:  # e.g. the inotify watch limit: keep listing instead
            with self._lock:
                self._last_error = f"cannot watch {self._root} for events: {exc}"
            return
        with self._lock:
            self._observer = observer
            self._armed_inode = inode
            self._next_listing_s = -math.inf  # catch up on what is already there

    def _disarm(self) -> None:
        with self._lock:
            observer, self._observer = self._observer, None
            self._armed_inode = None
        if observer is not None:
            observer.stop()
            observer.join(timeout=5.0)

    def _nap_s(self) -> float:
        """How long the waiter may sleep before something can be due, s (at least 1 ms)."""
        now_s = self._clock()
        with self._lock:
            deadlines = [self._next_listing_s, self._options.poll_interval_s + now_s]
            candidate_deadline = self._candidates.next_deadline_s()
        if candidate_deadline is not None:
            deadlines.append(candidate_deadline)
        return max(min(deadlines) - now_s, 0.001)

    def _record_event(self, event: FileSystemEvent) -> None:
        """Observer callback (watchdog's thread): record hints, decide nothing."""
        files: list[Path] = []
        folders: list[Path] = []
        if isinstance(event, DirCreatedEvent | DirMovedEvent):
            folder = Path(os.fsdecode(event.dest_path or event.src_path))
            if self._names.is_watched_folder(folder):
                folders.append(folder)
        elif isinstance(event, tuple(_EVENT_KINDS)):
            for raw in (event.src_path, event.dest_path):
                if raw and self._names.is_line(path := Path(os.fsdecode(raw))):
                    files.append(path)
        else:
            return
        now_s = self._clock()
        with self._lock:
            self._events_seen += 1
            self._last_event_s = now_s
            self._hinted_files.update(files)
            self._hinted_folders.update(folders)
        if files or folders:
            self._wake.set()
