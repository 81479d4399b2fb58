"""The morning summary: one self-contained HTML page (and its Markdown twin) over the
scans of a time window: per scan its images, lines, fit yield, alerts, duration and rate,
and what made it (``strayline summary``)."""

from strayline.summary._html import render_html
from strayline.summary._markdown import render_markdown
from strayline.summary.night import SummaryFiles, read_night, write_summary
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

__all__ = [
    "NightSummary",
    "ScanImage",
    "ScanSummary",
    "SummaryFiles",
    "image_caption",
    "image_href",
    "images_shown",
    "read_night",
    "render_html",
    "render_markdown",
    "scan_summary",
    "summary_stem",
    "write_summary",
]
