"""The line pipeline: files in, validate → fit → field → store → rules → alerts.

Files that are ready together (a catch-up, a burst, a ``process`` pass) go through
:meth:`LinePipeline.process_many`: the consecutive lines of one scan are fitted one by one,
then committed as one group (:meth:`~strayline.store.ScanStore.write_lines`: one set of
fsyncs, each chunk written once), judged by the rules in order, and the rule state is saved
once for the group. A single file is a group of one.

Beside the store it makes a finished scan's products and a running scan's live picture
(:mod:`strayline.pipeline._byproducts`).

:class:`LinePipeline` wires the stages together for one daemon (or one ``process`` pass).
Everything it needs per scan — the profile-resolved config, the fit model, the store, the
metrics memory — is settled once when the scan's first line arrives (:class:`ScanContext`), so
the per-line path never branches on configuration. Bad instrument files are quarantined
with a sidecar and an alert; nothing is deleted and the pipeline carries on. A scan whose
profile cannot be used runs with the base config and says so in a warning alert.

A scan context is registered only once it is complete: if opening a scan fails half-way
the store is closed again (releasing its writer's lock) and the next line starts afresh.

Each file is read by the reader its scan folder is given (``readers``,
:mod:`strayline.lines.readers`). A file that grows a line at a time (a growing scan file)
gives the lines its writer completed since it was last read: the reader is told which
lines the scan's store has (:meth:`LinePipeline._handed_over`, from the ledger, even after a
restart) and skips their rows; its lines go through the stages in groups like files. Such a
file is never quarantined: when it breaks its layout its scan is held with an alert, cleared
once it reads cleanly again.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import partial
from pathlib import Path

import numpy as np
import structlog

from strayline.alerts import (
    ACTIVE_ALERTS_FILE,
    ActiveAlerts,
    AlertEvent,
    AlertSink,
    deliver_remembered,
)
from strayline.config import Config, config_digest, select_profile
from strayline.errors import ConfigError, LineFileError, StoreError
from strayline.field import LineField, field_from_fit
from strayline.fit import LineFit, failed_fits, fit_line
from strayline.lines import (
    HELD_SCAN_RULE,
    LineLimits,
    LineReader,
    ScanLine,
    bad_file_event,
    held_scan_cleared,
    held_scan_event,
    quarantine_file,
)
from strayline.pipeline._byproducts import ScanByproducts
from strayline.pipeline._reseed import seed_tracker
from strayline.pipeline._setup import (
    MAX_OPEN_SCANS,
    ScanContext,
    fit_model_from_config,
    no_products,
    profile_event,
    progress_of,
    store_config,
    zfs_rule,
)
from strayline.pipeline.outcome import LineOutcome, PipelineStatistics
from strayline.rules import DecisionLog, MetricsTracker, RuleDecision, RuleEngine
from strayline.store import (
    LedgerEntry,
    ScanStore,
    open_store_reader,
    store_metadata_present,
    store_path,
)

__all__ = ["LinePipeline"]


#: Lines of a growing file taken through the stages at once (its catch-up is read, fitted
#: and committed in such groups, the file closed in between).
GROWING_BATCH = 32

Key = tuple[int, str]


@dataclass(frozen=True, eq=False)
class _Fitted:
    """A line read and fitted, waiting for its group's commit (or, committed before a crash
    cut its evaluation short, for its evaluation only)."""

    position: int  # in the batch of files
    path: Path
    line: ScanLine
    scan: ScanContext
    events: tuple[AlertEvent, ...]  # raised while opening its scan
    fit: LineFit
    field: LineField
    evaluate_only: bool
    read_s: float
    fit_s: float

    @property
    def key(self) -> tuple[str, int, str]:
        return (self.line.scan_id, self.line.line_index, self.line.direction)


@dataclass
class _Counters:
    lines_written: int = 0
    duplicates: int = 0
    quarantined: int = 0
    pixels_failed: int = 0
    last_scan_id: str | None = None
    last_line_index: int | None = None
    last_line_s: float | None = None


class LinePipeline:
    """Process scan-line files into their scans' stores and alert on what they show.

    Parameters
    ----------
    config : Config
        The daemon's base configuration; each scan gets its profile overlay.
    sink : AlertSink or None
        Where alert events go (the caller closes it); None builds one from ``config``,
        closed with the pipeline.
    active : ActiveAlerts or None
        The record of alerts raised outside the rule engine, shared with the service;
        None loads it from ``paths.state_dir``.
    root : Path or None
        The folder line files must lie in, symbolic links included (default
        ``paths.watch_root``; a ``process`` pass gives its own folder).
    background_products : bool
        Make a finished scan's products on a worker thread (the service does, so that
        a large scan's products never hold up its loop); otherwise at once, in
        :meth:`process`. Only with the worker is a running scan's live picture drawn
        (``products.live_image``), on that thread.
    clock : callable returning float, optional
        Wall-clock seconds (``time.time``) for the rule engine's stall detection.
    rule_state : Path or None
        Where the rule engine's state is kept (default ``paths.state_dir /
        rules_state.json``; a ``process`` pass keeps one per scan folder).
    move_bad_files : bool
        Quarantine a file that fails (the default); off, such a line is an
        ``unreadable`` outcome and nothing is moved (a refit, whose lines come from a
        store and whose files, if still there, belong to the archive).
    """

    def __init__(
        self,
        config: Config,
        *,
        sink: AlertSink | None = None,
        active: ActiveAlerts | None = None,
        root: Path | None = None,
        background_products: bool = False,
        clock: Callable[[], float] = time.time,
        rule_state: Path | None = None,
        move_bad_files: bool = True,
    ) -> None:
        self.config = config
        self._move_bad_files = move_bad_files
        self._log = structlog.get_logger("strayline.pipeline")
        self._limits = LineLimits(
            max_pixels=config.limits.max_pixels,
            max_freq=config.limits.max_freq,
            max_file_bytes=config.limits.max_file_bytes,
        )
        self._output_root = config.paths.output_root
        self._root = Path(root if root is not None else config.paths.watch_root).resolve()
        self._readers = config.reader_choice
        self._output_root.mkdir(parents=True, exist_ok=True)  # OSError: the output is unusable
        self._state_path = (
            rule_state if rule_state is not None else config.paths.state_dir / "rules_state.json"
        )
        self._sink = sink if sink is not None else AlertSink.from_config(config)
        self._owns_sink = sink is None
        self._engine = RuleEngine.restore(config.rule_set, self._state_path, clock=clock)
        self._decisions = DecisionLog(config.paths.state_dir)
        self._clock = clock
        self._active = (
            active
            if active is not None
            else ActiveAlerts(config.paths.state_dir / ACTIVE_ALERTS_FILE)
        )
        self._raw_spectra: bool | None = None  # None: as each scan's config says
        self._scans: dict[str, ScanContext] = {}  # open scans, least recently used first
        self._closed_progress: dict[str, tuple[int, int]] = {}
        self._counters = _Counters()
        self._byproducts = ScanByproducts(config, background=background_products, clock=clock)

    # -- one file -----------------------------------------------------------------------

    def process(self, path: Path) -> LineOutcome:
        """Run one line file through every stage; never raises for a bad file.

        Raises
        ------
        StoreError
            If the scan's store cannot be opened or written (the file is left in place).
        OSError
            If the file exists but cannot be read (the file is left in place).
        Exception
            A fault of strayline's (the caller sets the file aside, :meth:`set_aside`).
        """
        path = Path(path)
        outcomes = self._run_files([path], strict=True)
        return outcomes[-1] if outcomes else LineOutcome(path, "no_new_lines")

    def process_many(self, paths: Sequence[Path]) -> list[LineOutcome]:
        """Run files that are ready together through every stage, in order: the
        consecutive lines of one scan are committed as one group.

        Never raises for a bad file: an unreadable one gets an ``unreadable`` outcome
        (left in place), a fault of strayline's while processing one sets it aside with an
        alert (:meth:`set_aside`).

        Returns
        -------
        list of LineOutcome
            One per file, in order; a growing file gets one per line it gave (or one
            ``held`` or ``no_new_lines`` outcome, after those of its lines).

        Raises
        ------
        StoreError
            If a store cannot be opened or written: the lines committed before it stay
            committed (given again, their files come back as duplicates); the files of the
            failed group and those after it are left in place.
        """
        return self._run_files([Path(p) for p in paths], strict=False)

    def process_lines(self, lines: Sequence[tuple[Path, ScanLine]]) -> list[LineOutcome]:
        """Run lines read elsewhere (a store's raw spectra, for a refit) through every
        stage after reading, in order, as :meth:`process_many` runs files; each comes with
        the path of the line file it was first read from, which chooses its profile (by
        its folder) and names it in logs and outcomes.

        Raises
        ------
        StoreError
            As :meth:`process_many`.
        """
        items = [(Path(path), partial(_given, line)) for path, line in lines]
        return self._run(items, strict=False)

    def reader_for(self, path: Path) -> LineReader:
        """The reader of a file: the one its scan folder is given (``readers``)."""
        return self._readers.for_folder(Path(path).parent.name)

    def _run_files(self, paths: Sequence[Path], *, strict: bool) -> list[LineOutcome]:
        """Files through every stage: runs of one-line files as one :meth:`_run`, each
        growing file in groups of its lines (:meth:`_run_growing`)."""
        outcomes: list[LineOutcome] = []
        items: list[tuple[Path, Callable[[], ScanLine]]] = []
        for path in paths:
            reader = self.reader_for(path)
            if not reader.growing:
                items.append((path, partial(self._read, reader, path)))
                continue
            if items:
                outcomes += self._run(items, strict=strict)
                items = []
            outcomes += self._run_growing(reader, path, strict=strict)
        if items:
            outcomes += self._run(items, strict=strict)
        return outcomes

    def _read(self, reader: LineReader, path: Path) -> ScanLine:
        """The one line of a one-line file."""
        self._check_inside(path)
        lines = list(reader.read(path, limits=self._limits, handed_over=self._handed_over))
        if len(lines) != 1:
            raise LineFileError(
                path,
                "file",
                f"one line (the reader {reader.name} reads one per file)",
                f"{len(lines)} lines",
            )
        return lines[0]

    def _run_growing(self, reader: LineReader, path: Path, *, strict: bool) -> list[LineOutcome]:
        """A growing file's new lines through every stage, :data:`GROWING_BATCH` at a time
        (each group committed before the next is read); a broken file holds its scan."""
        outcomes: list[LineOutcome] = []
        try:
            self._check_inside(path)
            lines = reader.read(path, limits=self._limits, handed_over=self._handed_over)
            while True:
                group, stop = _take(lines, GROWING_BATCH)
                if group:
                    items = [(path, partial(_given, line)) for line in group]
                    outcomes += self._run(items, strict=strict)
                if stop is not None:
                    raise stop
                if len(group) < GROWING_BATCH:
                    break
        except FileNotFoundError:
            self._log.warning("line_vanished", file=str(path))
            return [*outcomes, LineOutcome(path, "vanished")]
        except LineFileError as error:
            return [*outcomes, self._hold(path, error)]
        except StoreError:
            raise
        except OSError as error:  # caught mid-write, say: read again later
            if strict:
                raise
            return [*outcomes, LineOutcome(path, "unreadable", problem=str(error))]
        except Exception as error:
            if strict:
                raise
            return [*outcomes, self.set_aside(path, error)]
        self._release(path)
        if not outcomes:
            self._log.debug("growing_file_unchanged", file=str(path))
            outcomes.append(LineOutcome(path, "no_new_lines"))
        return outcomes

    def _handed_over(self, scan_id: str) -> frozenset[Key]:
        """The lines of a scan its store has, committed and evaluated (a growing file's
        reader skips their rows): from the open store, else read from the store's ledger
        on disk (after a restart), else none. Lines of the store's last group commit that
        the rule engine may not have judged (a crash between the two) are left out, so
        they are read again and judged (:meth:`_unevaluated`)."""
        scan = self._scans.get(scan_id)
        if scan is not None:
            committed = scan.store.committed()
            group, commits = scan.store.last_group()
        else:
            where = store_path(self._output_root, scan_id)
            if not store_metadata_present(where):
                return frozenset()
            try:
                ledger = open_store_reader(where).ledger
            except StoreError:
                return frozenset()  # read every line: the store decides when it opens
            committed, group, commits = ledger.committed, ledger.last_group, ledger.commit_count
        return frozenset(committed) - self._unevaluated_keys(scan_id, committed, group, commits)

    def _run(
        self, items: Sequence[tuple[Path, Callable[[], ScanLine]]], *, strict: bool
    ) -> list[LineOutcome]:
        """:meth:`process` (``strict``: an unreadable file or a fault raises),
        :meth:`process_many` and :meth:`process_lines` (they become outcomes): each item
        is a file's path and what reads its line."""
        outcomes: list[LineOutcome | None] = [None] * len(items)
        group: list[_Fitted] = []
        for position, (path, read) in enumerate(items):
            try:
                started = time.perf_counter()
                line = read()
                read_s = time.perf_counter() - started
                key = (line.scan_id, line.line_index, line.direction)
                if group and (
                    line.scan_id != group[0].line.scan_id or any(f.key == key for f in group)
                ):  # another scan (its store may close an open one), or a line again
                    self._commit(group, outcomes, strict=strict)
                    group = []
                fitted = self._fit(position, path, line, read_s)
            except FileNotFoundError:
                self._log.warning("line_vanished", file=str(path))
                outcomes[position] = LineOutcome(path, "vanished")
                continue
            except LineFileError as error:
                outcomes[position] = self._quarantine(path, error)
                continue
            except StoreError:
                raise
            except OSError as error:  # the file is there but cannot be read now
                if strict:
                    raise
                outcomes[position] = LineOutcome(path, "unreadable", problem=str(error))
                continue
            except Exception as error:
                if strict:
                    raise
                outcomes[position] = self.set_aside(path, error)
                continue
            if isinstance(fitted, LineOutcome):
                outcomes[position] = fitted
            else:
                group.append(fitted)
        if group:
            self._commit(group, outcomes, strict=strict)
        return [outcome for outcome in outcomes if outcome is not None]

    def _fit(
        self, position: int, path: Path, line: ScanLine, read_s: float
    ) -> _Fitted | LineOutcome:
        """A read line's scan, its decision against the store, its fit and field; a line
        committed and evaluated already is a duplicate outcome."""
        scan, opening_events = self._scan_for(line, path)
        scan.store.check_line(line)  # a misfit is this file's fault: quarantined alone
        decision = scan.store.decide(line)
        if decision == "changed":
            self._log.warning(
                "line_superseded",
                scan=line.scan_id,
                line=line.line_index,
                direction=line.direction,
                file=str(path),
                replaces=scan.store.committed()[(line.line_index, line.direction)].source,
            )
        evaluate_only = decision == "duplicate" and self._unevaluated(line, scan)
        if decision == "duplicate" and not evaluate_only:
            return self._duplicate(path, line, opening_events, read_s=read_s)
        started = time.perf_counter()
        zfs_hz = scan.zfs_for(line)
        # a line's fit depends on its own file and the config alone (refits agree)
        fit = fit_line(line.freq_hz, line.counts, scan.fit_model, pair_center_hz=zfs_hz)
        line_field = field_from_fit(fit, zfs_hz=zfs_hz, sign=scan.sign, branch=scan.branch)
        return _Fitted(
            position=position,
            path=path,
            line=line,
            scan=scan,
            events=opening_events,
            fit=fit,
            field=line_field,
            evaluate_only=evaluate_only,
            read_s=read_s,
            fit_s=time.perf_counter() - started,
        )

    def _commit(
        self, group: list[_Fitted], outcomes: list[LineOutcome | None], *, strict: bool
    ) -> None:
        """Commit a group of one scan's fitted lines, then judge each in order, then save
        the rule state once (a crash before that save leaves the group unevaluated: its
        files are evaluated again when they come back, :meth:`_unevaluated`)."""
        scan = group[0].scan
        to_write = [f for f in group if not f.evaluate_only]
        try:
            receipts = scan.store.write_lines([(f.line, f.fit, f.field) for f in to_write])
        except OSError:
            raise
        except Exception as error:  # a fault of ours: set the group's files aside
            if strict:
                raise
            for f in group:
                outcomes[f.position] = self.set_aside(f.path, error)
            return
        write_s = {id(f): r.write_s for f, r in zip(to_write, receipts, strict=True)}
        superseded = {id(f): r.superseded for f, r in zip(to_write, receipts, strict=True)}
        failures = {id(f): int(np.count_nonzero(failed_fits(f.fit.status))) for f in group}
        # The lines are committed: count them before anything else can fail.
        for f in to_write:
            self._note_written(f.line, failures[id(f)])
            scan.lines_written += 1
        decisions: list[RuleDecision] = []
        judged: list[tuple[_Fitted, tuple[AlertEvent, ...], float]] = []
        for f in group:
            started = time.perf_counter()
            try:
                events = f.events + self._judge(f.line, scan, f.fit, f.field, decisions)
            except Exception as error:
                if strict:
                    raise
                outcomes[f.position] = self.set_aside(f.path, error)
                continue
            judged.append((f, events, time.perf_counter() - started))
        started = time.perf_counter()
        self._settle(decisions, scan.scan_id)
        settle_s = (time.perf_counter() - started) / max(len(judged), 1)
        for f, events, rules_s in judged:
            line = f.line
            if f.evaluate_only:
                outcomes[f.position] = self._duplicate(
                    f.path, line, events, evaluated=True, fit_s=f.fit_s, read_s=f.read_s
                )
                continue
            self._log.info(
                "line_processed",
                scan=line.scan_id,
                line=line.line_index,
                direction=line.direction,
                pixels=line.n_pixels,
                freqs=line.n_freq,
                failures=failures[id(f)],
                read_s=round(f.read_s, 4),
                fit_s=round(f.fit_s, 4),
                write_s=round(write_s[id(f)], 4),
                rules_s=round(rules_s + settle_s, 4),
                group=len(to_write),
                superseded=superseded[id(f)],
                alerts=len(events),
                file=f.path.name,
            )
            outcomes[f.position] = LineOutcome(
                f.path,
                "written",
                line.scan_id,
                line.line_index,
                line.direction,
                fit_s=f.fit_s,
                write_s=write_s[id(f)],
                failures=failures[id(f)],
                events=events,
                read_s=f.read_s,
                rules_s=rules_s + settle_s,
            )
        if to_write:
            self._byproducts.lines_committed(scan, len(to_write))
            scan.after_commit(scan, to_write[-1].line)

    def _duplicate(
        self,
        path: Path,
        line: ScanLine,
        events: tuple[AlertEvent, ...],
        *,
        evaluated: bool = False,
        fit_s: float = 0.0,
        read_s: float = 0.0,
    ) -> LineOutcome:
        """The outcome of a file whose line is committed already: skipped, or (after a
        crash between its commit and its evaluation) ``evaluated`` now."""
        self._counters.duplicates += 1
        where = {"scan": line.scan_id, "line": line.line_index, "direction": line.direction}
        if evaluated:
            self._log.warning(
                "line_evaluated_after_restart", **where, alerts=len(events), file=path.name
            )
        else:
            self._log.info("line_skipped_duplicate", **where, file=path.name)
        return LineOutcome(
            path,
            "duplicate",
            line.scan_id,
            line.line_index,
            line.direction,
            fit_s=fit_s,
            events=events,
            read_s=read_s,
        )

    def _check_inside(self, path: Path) -> None:
        """Refuse a symbolic link that leads out of the folder line files must lie in
        (a file elsewhere on the machine is no line of this instrument)."""
        if not path.is_symlink():
            return
        target = path.resolve()
        if not target.is_relative_to(self._root):
            raise LineFileError(
                path,
                "file",
                f"a line file inside {self._root} (a link may point only there)",
                f"a symbolic link to {target}",
            )

    def _judge(
        self,
        line: ScanLine,
        scan: ScanContext,
        fit: LineFit,
        line_field: LineField,
        decisions: list[RuleDecision],
    ) -> tuple[AlertEvent, ...]:
        """Metrics and rules for a committed line; its events delivered at once (before the
        rule state is saved: never a lost alert), its decision records added to
        ``decisions``."""
        metrics = scan.tracker.update(line, fit, line_field)
        raised = tuple(self._engine.evaluate_line(line.scan_id, metrics, source_sha256=line.sha256))
        decisions.extend(self._engine.last_decisions())
        for event in raised:
            self._sink.deliver(event)
        return raised

    def _settle(self, decisions: list[RuleDecision], scan_id: str) -> None:
        """After a group is judged: its decision records appended, the rule state saved
        (which records the group as evaluated)."""
        try:
            self._decisions.append(decisions)
        except OSError as error:  # a diagnostic record: never worth losing a line over
            self._log.warning("decision_record_failed", scan=scan_id, error=str(error))
        self._engine.save(self._state_path)

    def _unevaluated(self, line: ScanLine, scan: ScanContext) -> bool:
        """Whether a committed copy of ``line`` was never evaluated: it belongs to the
        store's latest group commit and comes after the rule engine's last evaluated line
        in that group (or that line is not in it): a crash fell between the group's commit
        and the rule state's save. Such a line is evaluated when its file comes again (the
        catch-up at start lists it). The rule state keeps the last few scans only; of a
        scan it no longer knows, only lines of the store's first group can be such."""
        if line.sha256 is None:
            return False
        group, commits = scan.store.last_group()
        keys = self._unevaluated_keys(line.scan_id, scan.store.committed(), group, commits)
        return (line.line_index, line.direction) in keys

    def _unevaluated_keys(
        self,
        scan_id: str,
        committed: Mapping[Key, LedgerEntry],
        group: tuple[Key, ...],
        commits: int,
    ) -> frozenset[Key]:
        """The lines of a store's last group commit the rule engine may not have judged
        (see :meth:`_unevaluated`)."""
        index, direction, sha256 = self._engine.last_evaluated(scan_id)
        if index is None or direction is None:  # a scan the rule state does not know
            return frozenset(group) if commits == len(group) else frozenset()
        last = (index, direction)
        if last not in group or committed[last].sha256 != sha256:
            return frozenset(group)
        return frozenset(group[group.index(last) + 1 :])

    def give_up(self, path: Path, reason: str) -> LineOutcome:
        """Quarantine a file that never became readable (the watcher gave up on it)."""
        error = LineFileError(path, "file", "complete and readable in time", reason)
        return self._quarantine(path, error)

    def set_aside(self, path: Path, error: Exception) -> LineOutcome:
        """Quarantine a file whose processing failed with an unexpected error (a fault of
        strayline's, not of the file as far as the checks know), with a note and an alert,
        so that it is neither dropped in silence nor retried on every start; it can be
        processed again once the fault is fixed."""
        self._log.error(
            "line_failed",
            file=str(path),
            error=f"{type(error).__name__}: {error}",
            exc_info=(type(error), error, error.__traceback__),
        )
        found = f"{type(error).__name__}: {error} (a fault of strayline; please report it)"
        return self._quarantine(
            path, LineFileError(path, "processing", "a line strayline can process", found)
        )

    def tick(self, now: float | None = None) -> tuple[AlertEvent, ...]:
        """Evaluate time-based rules (acquisition stalled) and deliver their events."""
        events = tuple(self._engine.evaluate_tick(now))
        if events:
            for event in events:
                self._sink.deliver(event)
            self._engine.save(self._state_path)
        return events

    def deliver(self, event: AlertEvent, *, notify: bool = True) -> None:
        """Send an event raised outside the rule engine (e.g. by the service) to the sink
        (``notify=False``: only to the alert log, for an event announced before).

        Such events are remembered while raised — keyed by (scan, rule), cleared by their
        "cleared" event — and saved in ``paths.state_dir`` so a restarted daemon still
        counts them in :meth:`statistics` and lists them in :meth:`active_alerts`. The
        rule engine's own state is not touched (its events are delivered by
        :meth:`process` and :meth:`tick`).

        Raises
        ------
        AlertNotLogged
            The alert log could not be written (the event was announced).
        StoreError
            If the remembered state cannot be saved (the event was delivered).
        """
        deliver_remembered(self._sink, self._active, event, notify=notify)

    def active_alerts(self) -> tuple[AlertEvent, ...]:
        """Raise events still active: the rule engine's, then those from :meth:`deliver`."""
        return tuple(self._engine.active()) + self._active.active()

    def set_raw_spectra(self, enabled: bool) -> None:
        """Turn the writing of raw spectra off or on for every open and future scan.

        Overrides ``store.raw_spectra`` of every config and profile until called again.
        An open store whose setting differs is closed and reopened with the new setting
        (between lines: its committed lines are all on disk).

        Raises
        ------
        StoreError
            The first store that could not be reopened (after trying every one); each such
            scan is dropped and reopened, with the new setting, by its next line.
        """
        self._raw_spectra = bool(enabled)
        failed: list[StoreError] = []
        for scan_id, scan in list(self._scans.items()):
            if scan.store.raw_spectra == self._raw_spectra:
                continue
            scan.store.close()
            try:
                scan.store = scan.reopen(self._raw_spectra)
            except StoreError as error:
                del self._scans[scan_id]  # its next line opens it afresh
                failed.append(error)
            except BaseException:
                del self._scans[scan_id]
                raise
        self._log.info("raw_spectra_set", enabled=self._raw_spectra, scans=len(self._scans))
        if failed:
            raise failed[0]

    # -- bookkeeping --------------------------------------------------------------------

    def statistics(self) -> PipelineStatistics:
        """A frozen snapshot of the work so far."""
        c = self._counters
        return PipelineStatistics(
            lines_written=c.lines_written,
            duplicates=c.duplicates,
            quarantined=c.quarantined,
            pixels_failed=c.pixels_failed,
            scans_open=len(self._scans),
            last_scan_id=c.last_scan_id,
            last_line_index=c.last_line_index,
            last_line_s=c.last_line_s,
            active_alerts=len(self._engine.active()) + len(self._active),
        )

    def count_on_from(self, previous: PipelineStatistics) -> None:
        """Start this pipeline's counts (lines written, duplicates, quarantined, failed
        pixels, the last line) where a previous pipeline of the same service left them,
        so that a reload does not reset what ``status`` and the logs report."""
        c = self._counters
        c.lines_written += previous.lines_written
        c.duplicates += previous.duplicates
        c.quarantined += previous.quarantined
        c.pixels_failed += previous.pixels_failed
        if c.last_line_s is None:
            c.last_scan_id = previous.last_scan_id
            c.last_line_index = previous.last_line_index
            c.last_line_s = previous.last_line_s

    def scan_progress(self) -> dict[str, tuple[int, int]]:
        """Per scan seen: (lines committed in its store, lines planned)."""
        out = dict(self._closed_progress)
        for scan_id, scan in self._scans.items():
            out[scan_id] = progress_of(scan.store)
        return out

    def wait_background(self, timeout_s: float) -> bool:
        """Block until the background jobs queued so far (products, live pictures) have
        run, at most ``timeout_s``; True if they have (and without a worker)."""
        return self._byproducts.wait_idle(timeout_s)

    def close(self) -> None:
        """Close every store, and the alert sink if this pipeline built it (waits for
        running hooks)."""
        for scan in self._scans.values():
            scan.store.close()
        self._scans.clear()
        self._engine.save(self._state_path)
        self._byproducts.close()  # products under way: a bounded wait, then go
        if self._owns_sink:
            self._sink.close()

    # -- internals ----------------------------------------------------------------------

    def _note_written(self, line: ScanLine, failures: int) -> None:
        c = self._counters
        c.lines_written += 1
        c.pixels_failed += failures
        c.last_scan_id = line.scan_id
        c.last_line_index = line.line_index
        c.last_line_s = time.time()

    def _hold(self, path: Path, error: LineFileError) -> LineOutcome:
        """A growing file that breaks its layout: left in place, its scan held with an
        alert (raised once per problem; read again whenever the file changes)."""
        event = held_scan_event(path, error, self._now())
        known = any(
            e.rule == HELD_SCAN_RULE and e.scan_id == event.scan_id and e.message == event.message
            for e in self._active.active()
        )
        self._log.warning("scan_held", file=str(path), problem=str(error), alerted=not known)
        if known:
            return LineOutcome(path, "held", scan_id=event.scan_id)
        self.deliver(event)
        return LineOutcome(path, "held", scan_id=event.scan_id, events=(event,))

    def _release(self, path: Path) -> None:
        """Clear the hold of a growing file that read cleanly."""
        scan_id = path.parent.name
        if any(e.rule == HELD_SCAN_RULE and e.scan_id == scan_id for e in self._active.active()):
            self._log.info("scan_released", file=str(path))
            self.deliver(held_scan_cleared(path, self._now()))

    def _quarantine(self, path: Path, error: LineFileError) -> LineOutcome:
        if not self._move_bad_files:  # a refit: the line is no file of ours to move
            self._log.error("line_refused", file=str(path), problem=str(error))
            return LineOutcome(path, "unreadable", problem=str(error))
        if self.reader_for(path).growing:  # its writer may still append: never move it
            return self._hold(path, error)
        self._counters.quarantined += 1
        try:
            record = quarantine_file(
                path,
                field=error.field,
                expected=error.expected,
                found=error.found,
                message=str(error),
            )
            moved_to = record.moved_to
        except OSError as os_error:  # cannot move it: leave it, say so, carry on
            moved_to = ""
            self._log.error("quarantine_failed", file=str(path), error=str(os_error))
        self._log.warning("line_quarantined", file=str(path), moved_to=moved_to, problem=str(error))
        event = bad_file_event(path, error, moved_to, self._now())
        self._sink.deliver(event)
        return LineOutcome(
            path,
            "quarantined",
            scan_id=event.scan_id,
            line_index=event.line_index,
            direction=event.direction,
            events=(event,),
        )

    def _now(self) -> datetime:
        return datetime.fromtimestamp(self._clock(), UTC)

    def _scan_for(self, line: ScanLine, path: Path) -> tuple[ScanContext, tuple[AlertEvent, ...]]:
        scan = self._scans.pop(line.scan_id, None)
        if scan is not None:
            self._scans[line.scan_id] = scan  # most recently used last
            return scan, ()
        scan, events = self._open_scan(line, path)
        self._scans[line.scan_id] = scan  # registered only once complete
        self._closed_progress.pop(line.scan_id, None)
        while len(self._scans) > MAX_OPEN_SCANS:
            self._close_scan(next(iter(self._scans)))
        return scan, events

    def _close_scan(self, scan_id: str) -> None:
        """Close a scan's store (its ledger descriptor and lock); its next line reopens it."""
        scan = self._scans.pop(scan_id)
        self._closed_progress[scan_id] = progress_of(scan.store)
        scan.store.close()
        self._log.info("scan_closed", scan=scan_id)

    def _scan_config(
        self, line: ScanLine, path: Path
    ) -> tuple[Config, str | None, tuple[AlertEvent, ...]]:
        """The scan's config; an unusable profile falls back to the base config, alerting."""
        profile = select_profile(self.config, path.parent.name, line.profile)
        if profile is None:
            return self.config, None, ()
        try:
            return self.config.with_profile(profile), profile, ()
        except ConfigError as error:
            available = self.config.available_profiles()
            event = profile_event(line, profile, error, available, self._now())
            self._log.warning(
                "profile_unusable",
                scan=line.scan_id,
                profile=profile,
                problem=str(error),
                available=list(available),
            )
            self._sink.deliver(event)
            return self.config, None, (event,)

    def _open_scan(self, line: ScanLine, path: Path) -> tuple[ScanContext, tuple[AlertEvent, ...]]:
        config, profile, events = self._scan_config(line, path)
        fit_model = fit_model_from_config(config)
        raw_spectra = config.store.raw_spectra if self._raw_spectra is None else self._raw_spectra
        opener = partial(
            ScanStore.open,
            self._output_root,
            line.scan_id,
            n_lines_planned=line.n_lines_planned,
            n_pixels=line.n_pixels,
            x_m=line.x_m,
            config_json=store_config(config, profile),
            config_digest=config_digest(config),
            nv_axis_rad=(line.nv_theta_rad, line.nv_phi_rad),
            tip_id=line.tip_id,
            compression_level=config.store.compression_level,
            chunk_lines=config.store.chunk_lines,
        )

        def reopen(enabled: bool) -> ScanStore:
            return opener(raw_spectra=enabled)

        store = reopen(raw_spectra)
        try:
            tracker = MetricsTracker()
            seed_tracker(tracker, store, line)
            scan = ScanContext(
                scan_id=line.scan_id,
                profile=profile,
                config=config,
                fit_model=fit_model,
                zfs_for=zfs_rule(config),
                sign=float(config.field.sign),
                branch=config.field.one_resonance_branch,
                store=store,
                tracker=tracker,
                reopen=reopen,
                after_commit=(
                    self._byproducts.when_complete if config.products.enabled else no_products
                ),
            )
        except BaseException:
            store.close()  # release the writer's lock: the next line opens it afresh
            raise
        # The scan is judged by its profile's rule set (rules, rule_overrides).
        self._engine.use_rules(line.scan_id, config.rule_set)
        if store.recovered_lines:
            self._log.warning(
                "store_recovered",
                scan=line.scan_id,
                lines=[f"{i}:{d}" for i, d in store.recovered_lines],
            )
        self._log.info(
            "scan_opened",
            scan=line.scan_id,
            profile=profile,
            store=str(store.path),
            lines_planned=line.n_lines_planned,
            pixels=line.n_pixels,
            raw_spectra=store.raw_spectra,
        )
        return scan, events


def _given(line: ScanLine) -> ScanLine:
    """The reader of a line that was read already."""
    return line


def _take(lines: Iterator[ScanLine], n: int) -> tuple[list[ScanLine], Exception | None]:
    """Up to ``n`` lines, and the exception that ended them early (the lines read before
    it are kept)."""
    taken: list[ScanLine] = []
    try:
        for line in lines:
            taken.append(line)
            if len(taken) == n:
                break
    except Exception as error:
        return taken, error
    return taken, None
