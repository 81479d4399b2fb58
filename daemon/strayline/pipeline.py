"""The line pipeline: one file in, validate → fit → field → store → rules → alerts.

:class:`LinePipeline` wires the stages together for one daemon (or one ``process`` pass).
Everything it needs per scan — the profile-resolved config, the fit model, the store, the
metrics memory — is settled once when the scan's first line arrives (:class:`_Scan`), so
the per-line path never branches on configuration. Bad instrument files are quarantined
with a sidecar and an alert; nothing is deleted and the pipeline carries on.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
import structlog

from strayline import __version__
from strayline.alerts import AlertSink
from strayline.config import Config, config_digest, select_profile
from strayline.errors import LineFileError
from strayline.field import field_from_fit
from strayline.fit import FitModel, FitStatus, fit_line
from strayline.lines import LineLimits, ScanLine, read_line_file
from strayline.metrics import ROW_KEYS, MetricsTracker
from strayline.physics.constants import D_ROOM_HZ, zfs_hz
from strayline.quarantine import quarantine_file
from strayline.rules import AlertEvent, RuleEngine, load_rules
from strayline.store import ScanStore

__all__ = ["LineOutcome", "LinePipeline", "PipelineStatistics", "fit_model_from_config"]

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


def fit_model_from_config(config: Config) -> FitModel:
    """The :class:`FitModel` that ``config.fit`` asks for (SI units)."""
    fit = config.fit
    centers = (
        (fit.center_min_hz, fit.center_max_hz)
        if fit.center_min_hz is not None and fit.center_max_hz is not None
        else None
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
    zfs_fixed_hz: float | None
    temperature_k: float | None
    sign: float
    branch: Literal["upper", "lower"]
    store: ScanStore
    tracker: MetricsTracker
    lines_written: int = 0

    def zfs_for(self, line: ScanLine) -> float:
        """D for this line: fixed by config, else from temperature, else room value."""
        if self.zfs_fixed_hz is not None:
            return self.zfs_fixed_hz
        temperature_k = (
            self.temperature_k if self.temperature_k is not None else (line.temperature_k)
        )
        if temperature_k is None:
            return D_ROOM_HZ
        return float(zfs_hz(temperature_k))


@dataclass
class _Counters:
    lines_written: int = 0
    duplicates: int = 0
    quarantined: int = 0
    pixels_failed: int = 0
    last_scan_id: str | None = None
    last_line_index: int | None = None
    last_line_s: float | None = None
    scan_lines: dict[str, int] = field(default_factory=dict)


class LinePipeline:
    """Process scan-line files into their scans' stores and alert on what they show.

    Parameters
    ----------
    config : Config
        The daemon's base configuration; each scan gets its profile overlay.
    sink : AlertSink or None
        Where alert events go; None builds one from ``config``.
    clock : callable returning float, optional
        Wall-clock seconds (``time.time``) for the rule engine's stall detection.
    """

    def __init__(
        self,
        config: Config,
        *,
        sink: AlertSink | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.config = config
        self._log = structlog.get_logger("strayline.pipeline")
        self._limits = LineLimits(
            max_pixels=config.limits.max_pixels,
            max_freq=config.limits.max_freq,
            max_file_bytes=config.limits.max_file_bytes,
        )
        self._watch_root = config.paths.watch_root
        self._output_root = config.paths.output_root
        self._state_path = config.paths.state_dir / "rules_state.json"
        self._sink = sink if sink is not None else AlertSink.from_config(config)
        self._engine = RuleEngine.restore(load_rules(config), self._state_path, clock=clock)
        self._scans: dict[str, _Scan] = {}
        self._counters = _Counters()

    # -- one file -----------------------------------------------------------------------

    def process(self, path: Path) -> LineOutcome:
        """Run one line file through every stage; never raises for a bad file."""
        path = Path(path)
        try:
            line = read_line_file(path, limits=self._limits)
            scan = self._scan_for(line, path)
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
                return LineOutcome(path, "duplicate", line.scan_id, line.line_index, line.direction)
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
        metrics = scan.tracker.update(line, fit, line_field)
        events = tuple(self._engine.evaluate_line(line.scan_id, metrics))
        self._engine.save(self._state_path)
        for event in events:
            self._sink.deliver(event)
        failures = int(np.count_nonzero(fit.status != FitStatus.OK))
        self._note_written(line, failures)
        scan.lines_written += 1
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
            self._engine.save(self._state_path)
            for event in events:
                self._sink.deliver(event)
        return events

    # -- bookkeeping --------------------------------------------------------------------

    def statistics(self) -> PipelineStatistics:
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
            active_alerts=len(self._engine.active()),
        )

    def scan_progress(self) -> dict[str, tuple[int, int]]:
        """Per open scan: (lines committed in this store, lines planned)."""
        out = {}
        for scan_id, scan in self._scans.items():
            stats = scan.store.statistics()
            out[scan_id] = (
                stats.committed_forward + stats.committed_backward,
                stats.n_lines_planned,
            )
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
        event = AlertEvent(
            time=datetime.now(UTC).isoformat(timespec="milliseconds"),
            scan_id=self._scan_id_of(path),
            rule="bad_file",
            severity="warning",
            state="raised",
            line_index=None,
            direction=None,
            pixel_range=None,
            seen_value=None,
            seen_unit="",
            baseline_value=None,
            baseline_spread=None,
            confidence_z=None,
            message=f"line file quarantined: {error}",
            advice=(
                f"the file was moved to {moved_to or 'nowhere (it vanished)'} with a note; "
                "check the acquisition software's writer; the line is missing from the map"
            ),
        )
        self._sink.deliver(event)
        return LineOutcome(path, "quarantined", events=(event,))

    def _scan_id_of(self, path: Path) -> str:
        """Best guess of a bad file's scan: its folder's name below the watch root."""
        return path.parent.name

    def _scan_for(self, line: ScanLine, path: Path) -> _Scan:
        scan = self._scans.get(line.scan_id)
        if scan is None:
            scan = self._open_scan(line, path)
            self._scans[line.scan_id] = scan
        return scan

    def _open_scan(self, line: ScanLine, path: Path) -> _Scan:
        profile = select_profile(self.config, path.parent.name, line.profile)
        config = self.config.with_profile(profile) if profile else self.config
        store = ScanStore.open(
            self._output_root,
            line.scan_id,
            n_lines_planned=line.n_lines_planned,
            n_pixels=line.n_pixels,
            x_m=line.x_m,
            config_json=_store_config(config, profile),
            config_digest=config_digest(config),
            raw_spectra=config.store.raw_spectra,
            compression_level=config.store.compression_level,
            chunk_lines=config.store.chunk_lines,
        )
        tracker = MetricsTracker()
        _seed_tracker(tracker, store, line)
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
        )
        return _Scan(
            scan_id=line.scan_id,
            profile=profile,
            config=config,
            fit_model=fit_model_from_config(config),
            zfs_fixed_hz=config.field.zfs_hz,
            temperature_k=config.field.temperature_k,
            sign=float(config.field.sign),
            branch=config.field.one_resonance_branch,
            store=store,
            tracker=tracker,
        )


def _store_config(config: Config, profile: str | None) -> dict[str, Any]:
    data = config.as_json_dict()
    data["_profile"] = profile
    data["_software_version"] = __version__
    data["_host_pid"] = os.getpid()
    return data


#: Store map that holds each metrics row key (rows not stored are rebuilt as NaN).
_ROW_FROM_MAP = {
    "field_nv_t": "field_nv_t",
    "field_nv_sigma_t": "field_nv_sigma_t",
    "pl_per_s": "pl_rate_cps",
    "center_mean_hz": "center_mean_hz",
}


def _seed_tracker(tracker: MetricsTracker, store: ScanStore, line: ScanLine) -> None:
    """After a restart, remember the last committed line of each direction."""
    committed = store.committed()
    for direction in ("forward", "backward"):
        done = [i for (i, d) in committed if d == direction and i < line.line_index]
        if not done:
            continue
        last = max(done)
        rows: dict[str, np.ndarray] = {}
        for key in ROW_KEYS:
            if key == "x_m":
                rows[key] = np.asarray(line.x_m, dtype=float)
            elif key in _ROW_FROM_MAP:
                rows[key] = np.asarray(
                    store.read_map(_ROW_FROM_MAP[key], direction)[last], dtype=float
                )
            else:
                rows[key] = np.full(store.n_pixels, np.nan)
        tracker.seed(direction, rows)
