"""The shell of the morning summary: read the stores, products and alert log of a time
window (:func:`read_night`), then write the page, its Markdown twin and copies of the
images beside them (:func:`write_summary`).

Read-only towards the daemon's files (stores through their reader, never the ledger's
lock), so it runs while the daemon writes. A store that cannot be read, a torn alert-log
line or an image that vanished is said on the page, never fatal.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, tzinfo
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import strayline
from strayline._atomic import write_bytes_atomic, write_text_atomic
from strayline.alerts import AlertEvent, active_now, read_alert_log
from strayline.config import Config, config_digest
from strayline.errors import StoreError
from strayline.heartbeat import describe_heartbeat, read_heartbeat
from strayline.lines import DIRECTIONS
from strayline.products import products_dir, status_fractions
from strayline.status import scan_status
from strayline.store import STATUS_FILL, NotAScanStore, StoreReader, open_store_reader
from strayline.summary._html import render_html
from strayline.summary._markdown import render_markdown
from strayline.summary.page import (
    NightSummary,
    ScanImage,
    ScanSummary,
    image_caption,
    image_href,
    images_shown,
    scan_summary,
    summary_stem,
)

__all__ = ["SummaryFiles", "read_night", "write_summary"]


@dataclass(frozen=True)
class SummaryFiles:
    """What :func:`write_summary` wrote."""

    html: Path
    markdown: Path
    images: tuple[Path, ...]


def _images(folders: Sequence[Path], stem: str, index: int, scan_id: str) -> list[ScanImage]:
    """The PNGs of the first products folder that exists (none: no image yet), those
    :func:`images_shown` keeps."""
    for folder in folders:
        if folder.is_dir():
            names = [
                p.name for p in folder.glob("*.png") if not p.name.startswith(".") and p.is_file()
            ]
            return [
                ScanImage(image_caption(n), folder / n, image_href(stem, index, scan_id, n))
                for n in images_shown(names)
            ]
    return []


def _mapping(value: Any) -> dict[str, Any]:
    return value if isinstance(value, dict) else {}


def _fractions(reader: StoreReader, done: dict[str, int]) -> dict[str, dict[str, float]]:
    out: dict[str, dict[str, float]] = {}
    for direction in DIRECTIONS:
        if done.get(direction, 0) == 0:
            continue
        status = reader.read_array("status", direction)
        out[direction] = status_fractions(status[status != STATUS_FILL])
    return out


def _scan(
    path: Path,
    index: int,
    *,
    stem: str,
    config: Config,
    since: datetime,
    until: datetime,
    alerts: Sequence[AlertEvent],
    active: Sequence[AlertEvent],
) -> ScanSummary | None:
    """The scan of store ``path`` if it had a line or an alert in the window."""
    reader = open_store_reader(path)
    entries = list(reader.ledger.committed.values())
    scan_id = reader.scan_id
    own = [e for e in alerts if e.scan_id == scan_id]
    if not own and not any(since <= e.processed_time <= until for e in entries):
        return None
    status = scan_status(path)
    recorded = _mapping(reader.attrs.get("config"))
    folder = _mapping(recorded.get("products")).get("folder")
    folders = [
        products_dir(path.parent, None if folder is None else Path(folder), scan_id),
        products_dir(path.parent, config.products.folder, scan_id),
    ]
    profile = recorded.get("_profile")
    return scan_summary(
        scan_id=scan_id,
        store=path,
        profile=None if profile is None else str(profile),
        n_lines_planned=status.n_lines_planned,
        lines_done=status.lines_done,
        first_commit=status.first_commit,
        last_commit=status.last_commit,
        pixels_done=status.pixels_done,
        fit_fractions=_fractions(reader, status.lines_done),
        images=_images(folders, stem, index, scan_id),
        alerts=own,
        active=[e for e in active if e.scan_id == scan_id],
        held=len(status.held),
        quarantined=status.quarantined,
        software_versions=[e.software_version for e in entries],
        config_digests=[e.config_digest for e in entries],
    )


def read_night(
    config: Config,
    *,
    since: datetime,
    until: datetime | None = None,
    config_path: Path | None = None,
) -> NightSummary:
    """The summary of the scans under ``paths.output_root`` with a line committed or an
    alert logged between ``since`` and ``until`` (default: now), most recent first."""
    until = until if until is not None else datetime.now(UTC)
    stem = summary_stem(until)
    problems: list[str] = []
    bad: list[str] = []
    try:
        events = [
            e for e in read_alert_log(config.paths.alert_log, bad_lines=bad) if e.datetime <= until
        ]
    except OSError as error:
        events = []
        problems.append(f"alert log {config.paths.alert_log} not read: {error}")
    problems += [f"alert log line skipped: {b}" for b in bad]
    window = [e for e in events if e.datetime >= since]
    active = active_now(events)
    scans: list[ScanSummary] = []
    for path in sorted(Path(config.paths.output_root).glob("*.zarr")):
        if not path.is_dir():
            continue
        try:
            scan = _scan(
                path,
                len(scans),
                stem=stem,
                config=config,
                since=since,
                until=until,
                alerts=window,
                active=active,
            )
        except NotAScanStore:
            continue
        except (StoreError, OSError) as error:
            problems.append(f"{path.name} not read: {error}")
            continue
        if scan is not None:
            scans.append(scan)
    epoch = datetime.min.replace(tzinfo=UTC)
    scans.sort(key=lambda s: s.last_commit or epoch, reverse=True)
    shown = {s.scan_id for s in scans}
    beat = read_heartbeat(config.paths.state_dir)
    return NightSummary(
        stem=stem,
        since=since,
        until=until,
        made=datetime.now(UTC),
        software_version=strayline.__version__,
        config_path=config_path,
        config_digest=config_digest(config),
        scans=tuple(scans),
        other_alerts=tuple(e for e in window if e.scan_id not in shown),
        daemon=None if beat is None else describe_heartbeat(beat, until),
        problems=tuple(problems),
    )


def write_summary(night: NightSummary, out_dir: Path, *, tz: tzinfo | None = None) -> SummaryFiles:
    """Copy each scan's images beside the page, then write ``<stem>.html`` and
    ``<stem>.md`` into ``out_dir`` (each file atomically; the pages last, so a page never
    names an image not yet there). An image that cannot be copied is left out of the
    pages, which say so. Times in ``tz`` (None: this machine's zone).

    Raises
    ------
    OSError
        If ``out_dir`` or a page cannot be written.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    copied: list[Path] = []
    problems = list(night.problems)
    scans = []
    for scan in night.scans:
        kept = []
        for image in scan.images:
            target = out_dir / unquote(image.href)
            try:
                data = image.source.read_bytes()
                target.parent.mkdir(parents=True, exist_ok=True)
                write_bytes_atomic(target, data)
            except OSError as error:
                problems.append(f"{scan.scan_id}: image {image.source.name} not copied: {error}")
                continue
            kept.append(image)
            copied.append(target)
        scans.append(replace(scan, images=tuple(kept)))
    night = replace(night, scans=tuple(scans), problems=tuple(problems))
    html = write_text_atomic(out_dir / f"{night.stem}.html", render_html(night, tz))
    markdown = write_text_atomic(out_dir / f"{night.stem}.md", render_markdown(night, tz))
    return SummaryFiles(html=html, markdown=markdown, images=tuple(copied))
