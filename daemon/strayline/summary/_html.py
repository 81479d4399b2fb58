"""The summary as one self-contained HTML page (pure): inline style, no script, no
request to anywhere; images by relative path. Every piece of text goes through
:func:`html.escape` (scan ids come from folder names, messages quote files)."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from datetime import tzinfo
from html import escape

from strayline.alerts import AlertEvent
from strayline.summary._text import (
    alert_where,
    confidence,
    moment,
    pace,
    progress,
    traces,
)
from strayline.summary.page import NightSummary, ScanSummary

__all__ = ["render_html", "scan_anchor"]

_STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 1.5em auto; max-width: 76em;
       padding: 0 1em; color: #1d1d1f; background: #fff; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; border-top: 1px solid #ccc; padding-top: 0.8em; margin-top: 1.6em; }
h3 { font-size: 1.05em; }
.meta { color: #555; margin-top: 0; }
table { border-collapse: collapse; margin: 0.5em 0; }
th, td { text-align: left; vertical-align: top; padding: 0.2em 0.7em 0.2em 0; }
table.alerts td, table.alerts th { border-bottom: 1px solid #e4e4e4; }
table.facts th { color: #555; font-weight: normal; white-space: nowrap; }
.images { display: flex; flex-wrap: wrap; gap: 1em; }
figure { margin: 0; }
figure img { max-width: 36em; width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { color: #555; font-size: 0.9em; }
.critical { color: #a40000; font-weight: bold; }
.warning { color: #8a5300; font-weight: bold; }
.info { color: #2a5a8a; }
tr.active td { background: #fff4e5; }
.none { color: #777; font-style: italic; }
code { font-size: 0.95em; }
"""


def scan_anchor(index: int) -> str:
    """The id of the ``index``-th scan's section (its table of contents links here)."""
    return f"scan-{index + 1:02d}"


def _e(text: object) -> str:
    return escape(str(text), quote=True)


def _rows(pairs: Iterable[tuple[str, str]]) -> list[str]:
    return [f"<tr><th>{_e(k)}</th><td>{v}</td></tr>" for k, v in pairs]


def _alerts_table(
    events: Sequence[AlertEvent], active: Iterable[AlertEvent], tz: tzinfo | None, *, scan: bool
) -> list[str]:
    if not events:
        return ['<p class="none">none</p>']
    still = set(active)
    head = ["time", "severity", "", *(["scan"] if scan else []), "line", "pixels", "rule"]
    out = [
        '<table class="alerts">',
        "<tr>" + "".join(f"<th>{_e(h)}</th>" for h in [*head, "what was seen", "z"]) + "</tr>",
    ]
    for event in events:
        line, pixels = alert_where(event)
        state = "raised" if event.state == "raised" else "cleared"
        if event in still:
            state += ", still active"
        cells = [
            _e(moment(event.datetime, tz)),
            f'<span class="{_e(event.severity)}">{_e(event.severity)}</span>',
            _e(state),
            *([_e(event.scan_id)] if scan else []),
            _e(line),
            _e(pixels),
            f"<code>{_e(event.rule)}</code>",
            _e(event.message) + (f"<br><small>{_e(event.advice)}</small>" if event.advice else ""),
            _e(confidence(event)),
        ]
        css = ' class="active"' if event in still else ""
        out.append(f"<tr{css}>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    out.append("</table>")
    return out


def _scan_section(index: int, scan: ScanSummary, tz: tzinfo | None) -> list[str]:
    facts = [
        ("lines", _e(progress(scan))),
        (
            "first and last line",
            f"{_e(moment(scan.first_commit, tz))} → {_e(moment(scan.last_commit, tz))}",
        ),
        ("duration, rate", _e(pace(scan))),
    ]
    facts += [(f"fit yield, {d}", _e(text)) for d, text in traces(scan)]
    active = len(scan.active)
    facts.append(
        (
            "alerts",
            _e(
                f"{sum(e.state == 'raised' for e in scan.alerts)} raised, "
                f"{sum(e.state == 'cleared' for e in scan.alerts)} cleared in the window"
                + (f"; {active} still active" if active else "")
            ),
        )
    )
    if scan.held or scan.quarantined:
        facts.append(
            (
                "line files",
                _e(f"{scan.held} not in the store yet, {scan.quarantined} in quarantine"),
            )
        )
    facts += [
        ("profile", _e(scan.profile or "base config")),
        ("store", f"<code>{_e(scan.store)}</code>"),
        ("written by", _e(", ".join(f"strayline {v}" for v in scan.software_versions) or "n/a")),
        (
            "config digest",
            ", ".join(f"<code>{_e(d[:12])}</code>" for d in scan.config_digests) or "n/a",
        ),
    ]
    out = [
        f'<section id="{scan_anchor(index)}">',
        f"<h2>{_e(scan.scan_id)}</h2>",
        '<table class="facts">',
        *_rows(facts),
        "</table>",
        '<div class="images">',
    ]
    if not scan.images:
        out.append('<p class="none">no quick-look image yet</p>')
    for image in scan.images:
        out += [
            "<figure>",
            f'<a href="{_e(image.href)}"><img src="{_e(image.href)}" alt="{_e(image.caption)}"'
            ' loading="lazy"></a>',
            f"<figcaption>{_e(image.caption)}</figcaption>",
            "</figure>",
        ]
    out += ["</div>", "<h3>Alerts</h3>"]
    out += _alerts_table(scan.alerts, scan.active, tz, scan=False)
    out.append("</section>")
    return out


def render_html(night: NightSummary, tz: tzinfo | None = None) -> str:
    """The page, times in ``tz`` (None: this machine's zone)."""
    title = f"Scans from {moment(night.since, tz)} to {moment(night.until, tz)}"
    meta = (
        f"made {moment(night.made, tz)} by strayline {night.software_version}; config "
        + (f"{night.config_path} " if night.config_path is not None else "")
        + f"(digest {night.config_digest[:12]})"
    )
    out = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>strayline: {_e(title)}</title>",
        f"<style>{_STYLE}</style>",
        "</head>",
        "<body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="meta">{_e(meta)}</p>',
    ]
    if night.daemon:
        out.append(f'<p class="meta">{_e(night.daemon)}</p>')
    for problem in night.problems:
        out.append(f'<p class="warning">{_e(problem)}</p>')
    if not night.scans:
        out.append('<p class="none">no scan had a line or an alert in this window</p>')
    else:
        out.append("<nav><ul>")
        for index, scan in enumerate(night.scans):
            marks = f", {len(scan.active)} alert(s) still active" if scan.active else ""
            out.append(
                f'<li><a href="#{scan_anchor(index)}">{_e(scan.scan_id)}</a>: '
                f"{_e(progress(scan))}{_e(marks)}</li>"
            )
        out.append("</ul></nav>")
    for index, scan in enumerate(night.scans):
        out += _scan_section(index, scan, tz)
    if night.other_alerts:
        out += ['<section id="other-alerts">', "<h2>Other alerts</h2>"]
        out += _alerts_table(night.other_alerts, (), tz, scan=True)
        out.append("</section>")
    out += ["</body>", "</html>"]
    return "\n".join(out) + "\n"
