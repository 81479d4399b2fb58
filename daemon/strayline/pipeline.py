"""The line pipeline: one file in, validate → fit → field → store → rules → alerts.

When a scan's last planned line is committed, the pipeline also makes the scan's products
once (images, vector field, sheet moment, report; :mod:`strayline.products`).

:class:`LinePipeline` wires the stages together for one daemon (or one ``process`` pass).
Everything it needs per scan — the profile-resolved config, the fit model, the store, the
metrics memory — is settled once when the scan's first line arrives (:class:`_Scan`), so
the per-line path never branches on configuration. Bad instrument files are quarantined
with a sidecar and an alert; nothing is deleted and the pipeline carries on. A scan whose
profile cannot be used runs with the base config and says so in a warning alert.

A scan context is registered only once it is complete: if opening a scan fails half-way
the store is closed again (releasing its writer's lock) and the next line starts afresh.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import partial
from pathlib import Path
from typing import Any, Literal

import numpy as np
import structlog

from strayline import __version__
from strayline.alerts import ACTIVE_ALERTS_FILE, ActiveAlerts, AlertEvent, AlertSink
from strayline.config import Config, config_digest, select_profile
from strayline.errors import ConfigError, LineFileError, StoreError
from strayline.field import field_from_fit
from strayline.fit import FitModel, FitStatus, fit_line
from strayline.lines import LineLimits, ScanLine, bad_file_event, quarantine_file, read_line_file
from strayline.physics import D_ROOM_HZ, zfs_hz
from strayline.products import make_products, products_dir
from strayline.rules import ROW_KEYS, MetricsTracker, RuleEngine, field_perp
from strayline.store import ScanStore
from strayline.watch import LineNames, list_tree

__all__ = [
    "PROFILE_RULE",
    "LineOutcome",
    "LinePipeline",
    "PipelineStatistics",
    "ProcessSummary",
    "fit_model_from_config",
    "process_folder",
    "profile_event",
    "zfs_rule",
]

#: Rule name of the warning raised when a scan's profile cannot be used.
PROFILE_RULE = "profile_unusable"

#: File (in ``paths.state_dir``) keeping the alerts raised through
#: :meth:`LinePipeline.deliver` that are still active, so a restart remembers them.

OutcomeKind = Literal["written", "duplicate", "quarantined", "vanished"]


@dataclass(frozen=True)
class LineOutcome:
    """What happened to one file.

    Attributes
    ----------
    path : Path
    kind : {"written", "duplicate", "quarantined", "vanished"}
    scan_id, direction : str or None
    line_index : int or None
    fit_s, write_s : float
        Wall time of the fit and of the store write, s (0 when not done).
    failures : int
        Pixels whose fit status is not OK.
    events : tuple of AlertEvent
        Alert events raised or cleared by this line.
    """

    path: Path
    kind: OutcomeKind
    scan_id: str | None = None
    line_index: int | None = None
    direction: str | None = None
    fit_s: float = 0.0
    write_s: float = 0.0
    failures: int = 0
    events: tuple[AlertEvent, ...] = ()


@dataclass(frozen=True)
class PipelineStatistics:
    """Snapshot of the pipeline's work since it was built."""

    lines_written: int
    duplicates: int
    quarantined: int
    pixels_failed: int
    scans_open: int
    last_scan_id: str | None
    last_line_index: int | None
    last_line_s: float | None
    active_alerts: int


#: Scans kept open at once: each holds its ledger's descriptor and lock. Older ones are
#: closed (a late line reopens its scan), so a daemon running for weeks does not collect
#: one descriptor per scan.
MAX_OPEN_SCANS = 4


def _progress(store: ScanStore) -> tuple[int, int]:
    stats = store.statistics()
    return stats.committed_forward + stats.committed_backward, stats.n_lines_planned


def fit_model_from_config(config: Config) -> FitModel:
    """The :class:`FitModel` that ``config.fit`` asks for (SI units).

    A one-sided centre window (only ``fit.center_min_mhz`` or only ``center_max_mhz``)
    gets an infinite other side. :func:`~strayline.fit.fit_line` intersects the window with
    each line's frequency grid, so the open side becomes that line's grid edge, line by
    line, and the model stays one constant per scan (no per-line work, no branching).
    """
    fit = config.fit
    lo, hi = fit.center_min_hz, fit.center_max_hz
    centers = (
        None
        if lo is None and hi is None
        else (-math.inf if lo is None else lo, math.inf if hi is None else hi)
    )
    return FitModel(
        n_dips=fit.n_dips,
        shared_width=fit.shared_width,
        hyperfine=fit.hyperfine,
        fit_slope=fit.fit_slope,
        fwhm_bounds_hz=(fit.fwhm_min_hz, fit.fwhm_max_hz),
        contrast_bounds=(0.0, fit.contrast_max),
        center_bounds_hz=centers,
        weighting=fit.weighting,
        max_iter=fit.max_iter,
        min_counts=fit.min_counts,
    )


@dataclass
class _Scan:
    """Everything settled once for one scan: config, fit model, store, metrics memory."""

    scan_id: str
    profile: str | None
    config: Config
    fit_model: FitModel
    zfs_for: Callable[[ScanLine], float]
    sign: float
    branch: Literal["upper", "lower"]
    store: ScanStore
    tracker: MetricsTracker
    reopen: Callable[[bool], ScanStore]
    after_commit: Callable[[_Scan, ScanLine], None]
    lines_written: int = 0
    products_done: bool = False


def zfs_rule(config: Config) -> Callable[[ScanLine], float]:
    """How a scan gets D for each line, settled once from ``config.field``.

    ``field.zfs_hz`` set: that value. Else ``field.temperature_k`` set: D(T) of that
    temperature, computed once. Else D(T) of each line file's temperature, and the room
    value :data:`~strayline.physics.constants.D_ROOM_HZ` for a file without one.
    """
    if config.field.zfs_hz is not None:
        fixed = float(config.field.zfs_hz)
    elif config.field.temperature_k is not None:
        fixed = float(zfs_hz(config.field.temperature_k))
    else:
        return _zfs_of_line
    return lambda _line: fixed


def _no_products(scan: _Scan, line: ScanLine) -> None:
    """Products are turned off for this scan (``products.enabled: false``)."""


def _zfs_of_line(line: ScanLine) -> float:
    return D_ROOM_HZ if line.temperature_k is None else float(zfs_hz(line.temperature_k))


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
        Where alert events go; None builds one from ``config``.
    active : ActiveAlerts or None
        The record of alerts raised outside the rule engine, shared with the service;
        None loads it from ``paths.state_dir``.
    clock : callable returning float, optional
        Wall-clock seconds (``time.time``) for the rule engine's stall detection.
    """

    def __init__(
        self,
        config: Config,
        *,
        sink: AlertSink | None = None,
        active: ActiveAlerts | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.config = config
        self._log = structlog.get_logger("strayline.pipeline")
        self._limits = LineLimits(
            max_pixels=config.limits.max_pixels,
            max_freq=config.limits.max_freq,
            max_file_bytes=config.limits.max_file_bytes,
        )
        self._output_root = config.paths.output_root
        self._state_path = config.paths.state_dir / "rules_state.json"
        self._sink = sink if sink is not None else AlertSink.from_config(config)
        self._engine = RuleEngine.restore(config.rule_set, self._state_path, clock=clock)
        self._clock = clock
        self._active = (
            active
            if active is not None
            else ActiveAlerts(config.paths.state_dir / ACTIVE_ALERTS_FILE)
        )
        self._raw_spectra: bool | None = None  # None: as each scan's config says
        self._scans: dict[str, _Scan] = {}  # open scans, least recently used first
        self._closed_progress: dict[str, tuple[int, int]] = {}
        self._counters = _Counters()

    # -- one file -----------------------------------------------------------------------

    def process(self, path: Path) -> LineOutcome:
        """Run one line file through every stage; never raises for a bad file."""
        path = Path(path)
        try:
            line = read_line_file(path, limits=self._limits)
            scan, opening_events = self._scan_for(line, path)
            decision = scan.store.decide(line)
            if decision == "duplicate":
                self._counters.duplicates += 1
                self._log.info(
                    "line_skipped_duplicate",
                    scan=line.scan_id,
                    line=line.line_index,
                    direction=line.direction,
                    file=path.name,
                )
                return LineOutcome(
                    path,
                    "duplicate",
                    line.scan_id,
                    line.line_index,
                    line.direction,
                    events=opening_events,
                )
            t0 = time.perf_counter()
            fit = fit_line(line.freq_hz, line.counts, scan.fit_model)
            line_field = field_from_fit(
                fit, zfs_hz=scan.zfs_for(line), sign=scan.sign, branch=scan.branch
            )
            t1 = time.perf_counter()
            receipt = scan.store.write_line(line, fit, line_field)
        except FileNotFoundError:
            self._log.warning("line_vanished", file=str(path))
            return LineOutcome(path, "vanished")
        except LineFileError as error:
            return self._quarantine(path, error)
        # The line is committed: count it before anything else can fail.
        failures = int(np.count_nonzero(fit.status != FitStatus.OK))
        self._note_written(line, failures)
        scan.lines_written += 1
        metrics = scan.tracker.update(line, fit, line_field)
        raised = tuple(self._engine.evaluate_line(line.scan_id, metrics))
        for event in raised:  # delivered before the state is saved: never a lost alert
            self._sink.deliver(event)
        self._engine.save(self._state_path)
        events = opening_events + raised
        self._log.info(
            "line_processed",
            scan=line.scan_id,
            line=line.line_index,
            direction=line.direction,
            pixels=line.n_pixels,
            freqs=line.n_freq,
            failures=failures,
            fit_s=round(t1 - t0, 4),
            write_s=round(receipt.write_s, 4),
            superseded=receipt.superseded,
            alerts=len(events),
            file=path.name,
        )
        scan.after_commit(scan, line)
        return LineOutcome(
            path,
            "written",
            line.scan_id,
            line.line_index,
            line.direction,
            fit_s=t1 - t0,
            write_s=receipt.write_s,
            failures=failures,
            events=events,
        )

    def give_up(self, path: Path, reason: str) -> LineOutcome:
        """Quarantine a file that never became readable (the watcher gave up on it)."""
        error = LineFileError(path, "file", "complete and readable in time", reason)
        return self._quarantine(path, error)

    def tick(self, now: float | None = None) -> tuple[AlertEvent, ...]:
        """Evaluate time-based rules (acquisition stalled) and deliver their events."""
        events = tuple(self._engine.evaluate_tick(now))
        if events:
            for event in events:
                self._sink.deliver(event)
            self._engine.save(self._state_path)
        return events

    def deliver(self, event: AlertEvent) -> None:
        """Send an event raised outside the rule engine (e.g. by the service) to the sink.

        Such events are remembered while raised — keyed by (scan, rule), cleared by their
        "cleared" event — and saved in ``paths.state_dir`` so a restarted daemon still
        counts them in :meth:`statistics` and lists them in :meth:`active_alerts`. The
        rule engine's own state is not touched (its events are delivered by
        :meth:`process` and :meth:`tick`).

        Raises
        ------
        StoreError
            If the remembered state cannot be saved (the event was delivered).
        """
        self._sink.deliver(event)
        self._active.note(event)
        self._active.save()

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

    def scan_progress(self) -> dict[str, tuple[int, int]]:
        """Per scan seen: (lines committed in its store, lines planned)."""
        out = dict(self._closed_progress)
        for scan_id, scan in self._scans.items():
            out[scan_id] = _progress(scan.store)
        return out

    def close(self) -> None:
        """Close every store and the alert sink (waits for running hooks)."""
        for scan in self._scans.values():
            scan.store.close()
        self._scans.clear()
        self._engine.save(self._state_path)
        self._sink.close()

    # -- internals ----------------------------------------------------------------------

    def _note_written(self, line: ScanLine, failures: int) -> None:
        c = self._counters
        c.lines_written += 1
        c.pixels_failed += failures
        c.last_scan_id = line.scan_id
        c.last_line_index = line.line_index
        c.last_line_s = time.time()

    def _quarantine(self, path: Path, error: LineFileError) -> LineOutcome:
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

    def _products_when_complete(self, scan: _Scan, line: ScanLine) -> None:
        """Make the scan's products once, when its last planned line is committed.

        Complete means: the last planned forward line is committed and, if the scan has a
        backward trace at all, its last planned line too (an instrument writing trace and
        retrace finishes with the retrace of the last line). A failure is logged as an
        error and never retried automatically (``strayline products`` remakes them).
        """
        if scan.products_done:
            return
        committed = scan.store.committed()
        last = scan.store.n_lines_planned - 1
        if (last, "forward") not in committed:
            return
        if (last, "backward") not in committed and any(d == "backward" for _, d in committed):
            return
        scan.products_done = True
        section = scan.config.products
        out_dir = products_dir(self._output_root, section.folder, scan.scan_id)
        started = time.perf_counter()
        try:
            report = make_products(
                scan.store.path,
                standoff_m=section.standoff_m,
                nv_theta_rad=line.nv_theta_rad,
                nv_phi_rad=line.nv_phi_rad,
                out_dir=out_dir,
                alert_log=self.config.paths.alert_log,
                images=section.images,
            )
        except Exception as error:  # products are a by-product: never stop the daemon
            self._log.error(
                "products_failed",
                scan=scan.scan_id,
                out_dir=str(out_dir),
                error=f"{type(error).__name__}: {error}",
                products_s=round(time.perf_counter() - started, 3),
            )
            return
        self._log.info(
            "products_written",
            scan=scan.scan_id,
            out_dir=str(out_dir),
            paths=[str(item.path) for item in report.files],
            skipped=[f"{item.product}: {item.reason}" for item in report.skipped],
            products_s=round(time.perf_counter() - started, 3),
        )

    def _now(self) -> datetime:
        return datetime.fromtimestamp(self._clock(), UTC)

    def _scan_for(self, line: ScanLine, path: Path) -> tuple[_Scan, tuple[AlertEvent, ...]]:
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
        self._closed_progress[scan_id] = _progress(scan.store)
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

    def _open_scan(self, line: ScanLine, path: Path) -> tuple[_Scan, tuple[AlertEvent, ...]]:
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
            config_json=_store_config(config, profile),
            config_digest=config_digest(config),
            nv_axis_rad=(line.nv_theta_rad, line.nv_phi_rad),
            compression_level=config.store.compression_level,
            chunk_lines=config.store.chunk_lines,
        )

        def reopen(enabled: bool) -> ScanStore:
            return opener(raw_spectra=enabled)

        store = reopen(raw_spectra)
        try:
            tracker = MetricsTracker()
            _seed_tracker(tracker, store, line)
            scan = _Scan(
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
                    self._products_when_complete if config.products.enabled else _no_products
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


def profile_event(
    line: ScanLine,
    profile: str,
    error: ConfigError,
    available: tuple[str, ...],
    now: datetime,
) -> AlertEvent:
    """The warning alert for a scan whose profile cannot be used (base config instead).

    Parameters
    ----------
    line : ScanLine
        The scan's first line seen by this daemon.
    profile : str
        The profile the line file or the folder rules asked for.
    error : ConfigError
        Why it cannot be used (unknown, invalid overlay).
    available : tuple of str
        The profiles that exist.
    now : datetime
        Aware time of the decision.
    """
    listing = ", ".join(available) if available else "none"
    return AlertEvent(
        time=now.astimezone(UTC).isoformat(timespec="milliseconds"),
        scan_id=line.scan_id,
        rule=PROFILE_RULE,
        severity="warning",
        state="raised",
        line_index=line.line_index,
        direction=line.direction,
        pixel_range=None,
        seen_value=None,
        seen_unit="",
        baseline_value=None,
        baseline_spread=None,
        confidence_z=None,
        message=(
            f"profile {profile!r} cannot be used ({error}); the scan is processed with the "
            f"base config; available profiles: {listing}"
        ),
        advice=(
            "fix the profile name in the acquisition software or the profile file, then "
            "reprocess the scan if its settings matter"
        ),
    )


def _store_config(config: Config, profile: str | None) -> dict[str, Any]:
    data = config.as_json_dict()
    data["_profile"] = profile
    data["_software_version"] = __version__
    data["_host_pid"] = os.getpid()
    return data


#: Store map that holds each metrics row key directly.
_ROW_FROM_MAP = {
    "field_nv_t": "field_nv_t",
    "field_nv_sigma_t": "field_nv_sigma_t",
    "pl_per_s": "pl_rate_cps",
    "center_mean_hz": "center_mean_hz",
}


def center_mean_sigma_from_maps(
    center_mean_hz: np.ndarray,
    freq_hi_hz: np.ndarray,
    freq_lo_sigma_hz: np.ndarray,
    freq_hi_sigma_hz: np.ndarray,
) -> np.ndarray:
    """1σ of the resonance-pair mean, rebuilt from the stored maps.

    Where both resonances were fitted the mean is (f₋ + f₊)/2, so with independent errors
    σ = ½·√(σ₋² + σ₊²) (Gaussian error propagation, common practice; the same expression
    :func:`~strayline.field.field_from_fit` uses). Where the dips merged into one, the mean
    *is* the one centre and σ = σ₋. Where no mean was computed the result is NaN.

    Parameters
    ----------
    center_mean_hz, freq_hi_hz, freq_lo_sigma_hz, freq_hi_sigma_hz : ndarray, shape (n,)
        Rows of the store's maps of the same names, Hz.

    Returns
    -------
    ndarray, shape (n,)
        σ of the centre mean, Hz.
    """
    mean = np.asarray(center_mean_hz, dtype=float)
    hi = np.asarray(freq_hi_hz, dtype=float)
    s_lo = np.asarray(freq_lo_sigma_hz, dtype=float)
    s_hi = np.asarray(freq_hi_sigma_hz, dtype=float)
    pair = 0.5 * np.hypot(s_lo, s_hi)
    out = np.where(np.isfinite(hi), pair, s_lo)
    return np.where(np.isfinite(mean), out, np.nan)


def _seed_tracker(tracker: MetricsTracker, store: ScanStore, line: ScanLine) -> None:
    """After a restart, remember the last committed lines of each direction.

    The tracker compares a line with the previous one and with a reference built from a
    few lines before it, so the last :data:`SEED_LINES` committed lines of each direction
    are seeded, oldest first. Every row is rebuilt from the store's maps except
    ``pl_sigma_per_s``: the store does not keep the PL rate's 1σ, so that row is NaN (no
    metric uses it today).
    """
    committed = store.committed()
    for direction in ("forward", "backward"):
        done = sorted(i for (i, d) in committed if d == direction and i < line.line_index)
        # Maps run in increasing x; metrics rows run in acquisition order, which is this
        # line's for its own direction and the reverse for the other one.
        x_m = np.asarray(line.x_m, dtype=float)
        x_m = x_m if direction == line.direction else x_m[::-1].copy()
        order = np.argsort(x_m, kind="stable")
        for index in done[-SEED_LINES:]:
            tracker.seed(direction, _stored_rows(store, direction, index, order, x_m))


#: Committed lines per direction given back to the metrics memory after a restart.
SEED_LINES = 4


def _stored_rows(
    store: ScanStore, direction: str, index: int, order: np.ndarray, x_m: np.ndarray
) -> dict[str, np.ndarray]:
    """The metrics rows (:data:`ROW_KEYS`) of one committed line, from the store's maps."""

    def row(name: str) -> np.ndarray:
        stored = np.asarray(store.read_map(name, direction)[index], dtype=float)
        in_file_order = np.empty_like(stored)
        in_file_order[order] = stored
        return in_file_order

    ok = row("status") == FitStatus.OK
    rows = {key: row(name) for key, name in _ROW_FROM_MAP.items()}
    for key in ("field_nv_t", "center_mean_hz"):  # as metrics.comparison_rows keeps them
        rows[key] = np.where(ok, rows[key], np.nan)
    rows["center_mean_sigma_hz"] = center_mean_sigma_from_maps(
        rows["center_mean_hz"],
        row("freq_hi_hz"),
        row("freq_lo_sigma_hz"),
        row("freq_hi_sigma_hz"),
    )
    rows["field_perp_t"] = field_perp(row("field_abs_t"), row("angle_rad"), ok)
    rows["pl_sigma_per_s"] = np.full(store.n_pixels, np.nan)
    rows["x_m"] = x_m
    return {key: rows[key] for key in ROW_KEYS}


@dataclass(frozen=True)
class ProcessSummary:
    """What one ``process`` pass did."""

    files: int
    written: int
    duplicates: int
    quarantined: int
    vanished: int
    pixels_failed: int
    alerts: int


def _summarise(outcomes: list[LineOutcome]) -> ProcessSummary:
    kinds = [o.kind for o in outcomes]
    return ProcessSummary(
        files=len(outcomes),
        written=kinds.count("written"),
        duplicates=kinds.count("duplicate"),
        quarantined=kinds.count("quarantined"),
        vanished=kinds.count("vanished"),
        pixels_failed=sum(o.failures for o in outcomes),
        alerts=sum(len(o.events) for o in outcomes),
    )


def process_folder(config: Config, folder: Path) -> ProcessSummary:
    """Process every line file below ``folder`` once (sorted by name), then return.

    The same pipeline as the daemon: already committed identical files are skipped, bad
    files are quarantined.
    """
    folder = Path(folder).absolute()
    listing = list_tree(folder, LineNames(folder, config.watch.pattern))
    if listing.error is not None and not listing.files:
        raise FileNotFoundError(f"{folder}: {listing.error}")
    pipeline = LinePipeline(config)
    outcomes: list[LineOutcome] = []
    try:
        for path in sorted(listing.files, key=lambda p: (p.parent, p.name)):
            outcomes.append(pipeline.process(path))
    finally:
        pipeline.close()
    return _summarise(outcomes)
