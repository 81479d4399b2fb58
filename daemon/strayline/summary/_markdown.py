"""The summary as Markdown (pure), the twin of the HTML page: the same scans, facts,
images (same relative paths) and alerts. Text that Markdown would read as markup is
escaped."""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from datetime import tzinfo

from strayline.alerts import AlertEvent, format_alert
from strayline.summary._text import moment, pace, progress, traces
from strayline.summary.page import NightSummary, ScanSummary

__all__ = ["md_escape", "render_markdown"]

_SPECIAL = re.compile(r"([\\`*_\[\]<>|])")  # what can start markup mid-line


def md_escape(text: object) -> str:
    """``text`` with Markdown's punctuation backslash-escaped and on one line."""
    return _SPECIAL.sub(r"\\\1", " ".join(str(text).split()))


def _alerts(
    events: Sequence[AlertEvent], active: Iterable[AlertEvent], tz: tzinfo | None
) -> list[str]:
    if not events:
        return ["- none"]
    still = set(active)
    return [
        f"- {md_escape(format_alert(e, tz=tz))}" + (" **(still active)**" if e in still else "")
        for e in events
    ]


def _scan(scan: ScanSummary, tz: tzinfo | None) -> list[str]:
    out = [
        f"## {md_escape(scan.scan_id)}",
        "",
        f"- lines: {md_escape(progress(scan))}",
        f"- first and last line: {moment(scan.first_commit, tz)} → {moment(scan.last_commit, tz)}",
        f"- duration, rate: {md_escape(pace(scan))}",
    ]
    out += [f"- fit yield, {d}: {md_escape(text)}" for d, text in traces(scan)]
    raised = sum(e.state == "raised" for e in scan.alerts)
    active = f"; {len(scan.active)} still active" if scan.active else ""
    out.append(
        f"- alerts: {raised} raised, {len(scan.alerts) - raised} cleared in the window{active}"
    )
    if scan.held or scan.quarantined:
        out.append(
            f"- line files: {scan.held} not in the store yet, {scan.quarantined} in quarantine"
        )
    versions = ", ".join(f"strayline {v}" for v in scan.software_versions) or "n/a"
    digests = ", ".join(f"`{d[:12]}`" for d in scan.config_digests) or "n/a"
    out += [
        f"- profile: {md_escape(scan.profile or 'base config')}",
        f"- store: {md_escape(scan.store)}",
        f"- written by {md_escape(versions)}; config digest {digests}",
        "",
    ]
    if not scan.images:
        out += ["*no quick-look image yet*", ""]
    for image in scan.images:
        out += [f"![{md_escape(image.caption)}]({image.href})", ""]
    out += ["### Alerts", "", *_alerts(scan.alerts, scan.active, tz), ""]
    return out


def render_markdown(night: NightSummary, tz: tzinfo | None = None) -> str:
    """The Markdown twin of :func:`strayline.summary._html.render_html`."""
    config = (
        f"{md_escape(night.config_path)} " if night.config_path is not None else ""
    ) + f"(digest `{night.config_digest[:12]}`)"
    out = [
        f"# Scans from {moment(night.since, tz)} to {moment(night.until, tz)}",
        "",
        f"- made {moment(night.made, tz)} by strayline {md_escape(night.software_version)}; "
        f"config {config}",
    ]
    if night.daemon:
        out.append(f"- {md_escape(night.daemon)}")
    out += [f"- **{md_escape(problem)}**" for problem in night.problems]
    out.append("")
    if not night.scans:
        out += ["*no scan had a line or an alert in this window*", ""]
    for scan in night.scans:
        out += _scan(scan, tz)
    if night.other_alerts:
        out += ["## Other alerts", "", *_alerts(night.other_alerts, (), tz), ""]
    return "\n".join(out).rstrip("\n") + "\n"
