"""The morning summary's content: one record per scan and one for the night, built by
pure functions from what :mod:`strayline.summary.night` reads (scan statuses, fit-status
fractions, product images, alerts), and rendered by :mod:`strayline.summary._html` and
:mod:`strayline.summary._markdown`.

Times are aware datetimes; durations in seconds, rates in lines per hour; fractions in
[0, 1]. An image is named by ``href``, a path relative to the page (URL form), the one
the writer copies the image to, so the page opens from disk with nothing else.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import quote

from strayline.alerts import AlertEvent
from strayline.lines import DIRECTIONS

__all__ = [
    "NightSummary",
    "ScanImage",
    "ScanSummary",
    "image_caption",
    "image_href",
    "images_shown",
    "scan_summary",
    "summary_stem",
]

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
_KINDS = {"quicklook": "quick-look", "vector": "vector field", "live": "live picture"}
#: Images first by kind, then by name.
_IMAGE_ORDER = ("quicklook", "live", "vector")


@dataclass(frozen=True)
class ScanImage:
    """One image of a scan on the page.

    Attributes
    ----------
    caption : str
    source : Path
        The image the products step wrote.
    href : str
        Where the page finds its copy: a relative URL path (percent-encoded).
    """

    caption: str
    source: Path
    href: str


@dataclass(frozen=True)
class ScanSummary:
    """One scan of the night.

    Attributes
    ----------
    scan_id : str
    store : Path
    profile : str or None
        The sample-type profile the scan ran with (None: the base config).
    n_lines_planned : int
    lines_done : dict[str, int]
        Committed lines per direction.
    first_commit, last_commit : datetime or None
    duration_s : float or None
        From the first committed line to the last.
    rate_lines_per_h : float or None
        Lines of the busiest direction per hour over that duration (None with fewer than
        two lines or no time between them).
    pixels_done : int
        Written pixels, both directions.
    fit_fractions : dict[str, dict[str, float]]
        Per direction with committed lines: the fraction of its written pixels per fit
        status (every status named; see :func:`strayline.products.status_fractions`).
    images : tuple of ScanImage
        None yet: the page says so.
    alerts : tuple of AlertEvent
        The scan's alerts in the window, oldest first.
    active : tuple of AlertEvent
        Those of its alerts raised and not cleared by the end of the window.
    held, quarantined : int
        Line files waiting outside the store; files in the scan's quarantine.
    software_versions, config_digests : tuple of str
        What wrote its lines (usually one of each).
    """

    scan_id: str
    store: Path
    profile: str | None
    n_lines_planned: int
    lines_done: Mapping[str, int]
    first_commit: datetime | None
    last_commit: datetime | None
    duration_s: float | None
    rate_lines_per_h: float | None
    pixels_done: int
    fit_fractions: Mapping[str, Mapping[str, float]]
    images: tuple[ScanImage, ...] = ()
    alerts: tuple[AlertEvent, ...] = ()
    active: tuple[AlertEvent, ...] = ()
    held: int = 0
    quarantined: int = 0
    software_versions: tuple[str, ...] = ()
    config_digests: tuple[str, ...] = ()

    @property
    def complete(self) -> bool:
        """Every planned line of the forward trace is in the store."""
        return self.lines_done.get("forward", 0) >= self.n_lines_planned

    @property
    def fit_ok_fraction(self) -> float | None:
        """Fits OK over written pixels of both directions (None before any pixel)."""
        if not self.pixels_done:
            return None
        weights = {d: self.lines_done.get(d, 0) for d in self.fit_fractions}
        total = sum(weights.values())
        if not total:
            return None
        return sum(self.fit_fractions[d].get("ok", 0.0) * w for d, w in weights.items()) / total


@dataclass(frozen=True)
class NightSummary:
    """The page: the window, what made it, and the scans active in it.

    Attributes
    ----------
    stem : str
        The pages' file name without suffix (:func:`summary_stem`); the images' folder
        is ``<stem>_files``.
    since, until : datetime
        The window (aware).
    made : datetime
    software_version : str
    config_path : Path or None
    config_digest : str
    scans : tuple of ScanSummary
        Most recently active first.
    other_alerts : tuple of AlertEvent
        Alerts in the window of no scan on the page (the service's own, a file
        quarantined in a folder with no store).
    daemon : str or None
        What the daemon's heartbeat said at the end of the window.
    problems : tuple of str
        What could not be read (an alert log line, a store), said on the page.
    """

    stem: str
    since: datetime
    until: datetime
    made: datetime
    software_version: str
    config_path: Path | None
    config_digest: str
    scans: tuple[ScanSummary, ...]
    other_alerts: tuple[AlertEvent, ...] = ()
    daemon: str | None = None
    problems: tuple[str, ...] = field(default=())


def summary_stem(until: datetime) -> str:
    """The file name (without suffix) of the summary ending at ``until``:
    ``summary-20260302T070000Z`` (UTC, so names sort by time)."""
    return f"summary-{until.astimezone(UTC):%Y%m%dT%H%M%SZ}"


def image_caption(name: str) -> str:
    """What an image of the products folder shows, from its name:
    ``quicklook_forward.png`` → ``quick-look, forward trace``; another name → its stem."""
    stem = Path(name).stem
    kind, _, direction = stem.partition("_")
    if kind in _KINDS and direction in DIRECTIONS:
        return f"{_KINDS[kind]}, {direction} trace"
    return stem.replace("_", " ")


def images_shown(names: Iterable[str]) -> list[str]:
    """The images of a products folder to show, in order: quick-looks, live pictures,
    vector fields, others, each by name; a trace's live picture is left out once its
    scan-end quick-look exists (the same maps, final)."""
    names = list(names)
    final = {Path(n).stem.removeprefix("quicklook_") for n in names if n.startswith("quicklook_")}

    def key(name: str) -> tuple[int, str]:
        kind = Path(name).stem.partition("_")[0]
        return (_IMAGE_ORDER.index(kind) if kind in _IMAGE_ORDER else len(_IMAGE_ORDER), name)

    shown = [
        n for n in names if not (n.startswith("live_") and Path(n).stem[len("live_") :] in final)
    ]
    return sorted(shown, key=key)


def image_href(stem: str, index: int, scan_id: str, name: str) -> str:
    """Where the copy of a scan's image goes, relative to the page, as a URL path:
    ``<stem>_files/<index>-<scan id made safe>/<name>``; the index keeps two scan ids
    that make the same safe name apart."""
    folder = f"{index:02d}-{_UNSAFE.sub('_', scan_id)[:60]}"
    return "/".join(quote(part) for part in (f"{stem}_files", folder, _UNSAFE.sub("_", name)))


def scan_summary(
    *,
    scan_id: str,
    store: Path,
    profile: str | None,
    n_lines_planned: int,
    lines_done: Mapping[str, int],
    first_commit: datetime | None,
    last_commit: datetime | None,
    pixels_done: int,
    fit_fractions: Mapping[str, Mapping[str, float]],
    images: Sequence[ScanImage] = (),
    alerts: Sequence[AlertEvent] = (),
    active: Iterable[AlertEvent] = (),
    held: int = 0,
    quarantined: int = 0,
    software_versions: Iterable[str] = (),
    config_digests: Iterable[str] = (),
) -> ScanSummary:
    """A scan's record, with its duration (first to last commit) and its average rate:
    (lines of the busiest direction − 1) / duration."""
    duration_s = None
    rate = None
    if first_commit is not None and last_commit is not None:
        duration_s = (last_commit - first_commit).total_seconds()
        busiest = max(lines_done.values(), default=0)
        if duration_s > 0 and busiest >= 2:
            rate = (busiest - 1) / (duration_s / 3600.0)
    return ScanSummary(
        scan_id=scan_id,
        store=store,
        profile=profile,
        n_lines_planned=n_lines_planned,
        lines_done=dict(lines_done),
        first_commit=first_commit,
        last_commit=last_commit,
        duration_s=duration_s,
        rate_lines_per_h=rate,
        pixels_done=pixels_done,
        fit_fractions={d: dict(f) for d, f in fit_fractions.items()},
        images=tuple(images),
        alerts=tuple(alerts),
        active=tuple(active),
        held=held,
        quarantined=quarantined,
        software_versions=tuple(sorted(set(software_versions))),
        config_digests=tuple(sorted(set(config_digests))),
    )
