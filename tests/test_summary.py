"""Tests of the morning summary (strayline.summary): a page over real stores made by the
pipeline, its links, its Markdown twin, its escaping, its window."""

from __future__ import annotations

import dataclasses
import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path
from typing import Any
from urllib.parse import unquote, urlsplit

import pytest
import yaml

import demo_stream as ds
from strayline.alerts import read_alert_log
from strayline.cli import main
from strayline.config import load_config
from strayline.pipeline import LinePipeline
from strayline.products import status_fractions
from strayline.store import STATUS_FILL, open_store_reader
from strayline.summary import (
    NightSummary,
    ScanImage,
    image_caption,
    image_href,
    images_shown,
    read_night,
    render_html,
    render_markdown,
    scan_summary,
    write_summary,
)

N_LINES = 6
N_PIXELS = 16
DONE = "night-a"  # every line, products made
RUNNING = "night.b"  # half its lines: no image yet


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder with a config, a complete scan with its images, a half-done one and a
    quarantined file of the complete scan in the alert log (demo scans, fixed seeds)."""
    root = tmp_path_factory.mktemp("night")
    for seed, scan_id in enumerate((DONE, RUNNING)):
        config = ds.DemoConfig(
            scene=ds.labyrinth(), n_lines=N_LINES, n_pixels=N_PIXELS, seed=seed, scan_id=scan_id
        )
        ds.run_scan(config, root / "incoming", root / "truth")
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "alerts": {"console": False},
    }
    (root / "strayline.yaml").write_text(yaml.safe_dump(data), encoding="utf-8")
    pipeline = LinePipeline(load_config(root / "strayline.yaml"))
    try:
        for path in sorted((root / "incoming" / DONE).glob("line_*.h5")):
            pipeline.process(path)
        for path in sorted((root / "incoming" / RUNNING).glob("line_*.h5"))[:3]:
            pipeline.process(path)
        bad = root / "incoming" / DONE / "line_00007_fwd.h5"
        bad.write_bytes(b"not an HDF5 file")
        pipeline.process(bad)
    finally:
        pipeline.close()
    return root


class _Links(HTMLParser):
    """Every <img src>, <a href> and id of a page, and the tags it holds (Python's own
    HTML parser, html.parser, reads it)."""

    def __init__(self) -> None:
        super().__init__()
        self.targets: list[str] = []
        self.images: list[str] = []
        self.ids: set[str] = set()
        self.tags: set[str] = set()
        self.h2: list[str] = []
        self._in_h2 = False
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.add(tag)
        values = dict(attrs)
        if values.get("id"):
            self.ids.add(str(values["id"]))
        if tag == "img":
            self.images.append(str(values["src"]))
            self.targets.append(str(values["src"]))
        if tag == "a":
            self.targets.append(str(values["href"]))
        self._in_h2 = tag == "h2"

    def handle_endtag(self, tag: str) -> None:
        if tag == "h2":
            self._in_h2 = False

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._in_h2:
            self.h2.append(data)


def _parse(page: Path) -> _Links:
    parser = _Links()
    parser.feed(page.read_text(encoding="utf-8"))
    parser.close()
    return parser


def _summary(night: Path, out: Path, *extra: str) -> tuple[Path, Path]:
    """Run ``strayline summary`` into ``out``; the page and its Markdown."""
    code = main(
        ["summary", "-c", str(night / "strayline.yaml"), "--out", str(out), "--utc", *extra]
    )
    assert code == 0
    (page,) = out.glob("summary-*.html")
    return page, page.with_suffix(".md")


def test_every_image_and_link_of_the_page_is_a_file_beside_it(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Parsed with Python's html.parser, the page names images and links only by relative
    paths to files that exist beside it (or to its own sections); it has no script, no
    style sheet or other resource to fetch, and the complete scan shows its quick-look
    while the half-done one says it has none yet."""
    page, _ = _summary(night, tmp_path / "out")
    # the quarantined file's alert is raised and never cleared: a bad file is a one-off
    assert "2 scan(s), 1 alert(s) still active" in capsys.readouterr().out
    links = _parse(page)
    assert not links.tags & {"script", "link", "iframe", "object", "embed"}
    assert links.images, "the complete scan's images are on the page"
    for target in links.targets:
        parts = urlsplit(target)
        assert not parts.scheme, target  # nothing to fetch
        assert not parts.netloc, target
        if not parts.path:
            assert parts.fragment in links.ids, target
            continue
        assert not parts.path.startswith("/"), target
        assert (page.parent / unquote(parts.path)).is_file(), target
    text = " ".join(links.text)
    assert links.h2 == [RUNNING, DONE]  # most recent line first
    assert "no quick-look image yet" in text
    assert text.count("no quick-look image yet") == 1
    originals = [p.name for p in (night / "output" / f"{DONE}.products").glob("*.png")]
    assert "quicklook_forward.png" in originals
    assert [Path(unquote(src)).name for src in links.images] == images_shown(originals)


def test_the_markdown_has_the_same_scans_and_images_as_the_page(
    night: Path, tmp_path: Path
) -> None:
    """The Markdown twin names the same scans, in the same order, and the same image
    files (relative paths that exist) as the HTML page."""
    page, markdown = _summary(night, tmp_path / "out")
    links = _parse(page)
    text = markdown.read_text(encoding="utf-8")
    scans = [line[3:].replace("\\", "") for line in text.splitlines() if line.startswith("## ")]
    assert scans == links.h2
    images = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", text)
    assert images == links.images
    for src in images:
        assert (markdown.parent / unquote(src)).is_file()


def test_the_page_states_lines_yield_alerts_and_what_made_it(night: Path, tmp_path: Path) -> None:
    """Per scan the page gives lines done of planned, the fit yield of the store's status
    map (products.status_fractions), the alert of the quarantined file with its line, and
    the config digest and version that wrote it; at the top the config file."""
    page, markdown = _summary(night, tmp_path / "out")
    text = " ".join(_parse(page).text)
    assert f"{N_LINES} of {N_LINES} lines (complete)" in text
    assert f"3 of {N_LINES} lines" in text
    reader = open_store_reader(night / "output" / f"{DONE}.zarr")
    status = reader.read_array("status", "forward")
    ok = status_fractions(status[status != STATUS_FILL])["ok"]
    assert f"OK {100 * ok:.1f} %" in text or (0.9995 <= ok < 1 and "OK > 99.9 %" in text)
    (entry,) = {(e.software_version, e.config_digest) for e in reader.ledger.committed.values()}
    assert f"strayline {entry[0]}" in text
    assert entry[1][:12] in text
    assert str(night / "strayline.yaml") in text
    md = markdown.read_text(encoding="utf-8")
    for words in (f"{N_LINES} of {N_LINES} lines", "bad\\_file", " line 7 ", entry[1][:12]):
        assert words in md
    assert "bad_file" in text
    (event,) = read_alert_log(night / "output" / "alerts.jsonl", scan_id=DONE)
    assert event.line_index == 7


def test_text_from_folders_and_files_is_escaped(night: Path, tmp_path: Path) -> None:
    """An alert whose message holds markup (``<script>``, ``&``, quotes, Markdown
    brackets) appears as text: html.parser finds no script element, the Markdown escapes
    the brackets."""
    config = load_config(night / "strayline.yaml")
    (event,) = read_alert_log(config.paths.alert_log, scan_id=DONE)
    hostile = dataclasses.replace(
        event, message='<script>alert("x")</script> & [link](http://x) *bold*'
    )
    summary = read_night(config, since=event.datetime - timedelta(hours=1))
    scans = tuple(
        dataclasses.replace(s, alerts=(hostile,)) if s.scan_id == DONE else s for s in summary.scans
    )
    summary = dataclasses.replace(summary, scans=scans)
    files = write_summary(summary, tmp_path / "out", tz=UTC)
    links = _parse(files.html)
    assert "script" not in links.tags
    assert '<script>alert("x")</script> & [link](http://x) *bold*' in "".join(links.text)
    assert "http://x" not in links.targets
    md = files.markdown.read_text(encoding="utf-8")
    assert '\\<script\\>alert("x")\\</script\\> & \\[link\\](http://x) \\*bold\\*' in md


def test_the_window_keeps_the_scans_with_a_line_or_an_alert_in_it(night: Path) -> None:
    """A window after every commit and alert holds no scan; one around them holds both,
    most recently active first; an alert of a scan with no store is listed apart."""
    config = load_config(night / "strayline.yaml")
    later = datetime.now(UTC) + timedelta(hours=1)
    assert read_night(config, since=later, until=later + timedelta(hours=1)).scans == ()
    summary = read_night(config, since=later - timedelta(days=1), until=later)
    assert [s.scan_id for s in summary.scans] == [RUNNING, DONE]
    assert summary.other_alerts == ()
    done = next(s for s in summary.scans if s.scan_id == DONE)
    assert done.complete
    assert done.images
    assert done.alerts
    assert summary.scans[0].images == ()


def test_a_bad_since_is_refused(night: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """``--since yesterday`` exits 2 naming what --since takes."""
    code = main(["summary", "-c", str(night / "strayline.yaml"), "--since", "yesterday"])
    assert code == 2
    assert "--since must be an ISO 8601 time" in capsys.readouterr().err


def test_an_image_that_vanished_is_left_out_and_said(tmp_path: Path) -> None:
    """An image gone between the reading and the writing is not named by either page,
    which say so; the images that were there are copied."""
    source = tmp_path / "quicklook_forward.png"
    source.write_bytes(b"\x89PNG\r\n\x1a\n")
    t0 = datetime(2026, 3, 2, 1, 0, tzinfo=UTC)
    images = [
        ScanImage("quick-look", source, image_href("s", 0, "film-7", source.name)),
        ScanImage("gone", tmp_path / "gone.png", image_href("s", 0, "film-7", "gone.png")),
    ]
    scan = scan_summary(
        scan_id="film-7",
        store=tmp_path / "film-7.zarr",
        profile=None,
        n_lines_planned=10,
        lines_done={"forward": 4, "backward": 0},
        first_commit=t0,
        last_commit=t0 + timedelta(minutes=30),
        pixels_done=64,
        fit_fractions={"forward": {"ok": 0.99975, "failed": 0.00025}},
        images=images,
    )
    summary = NightSummary(
        stem="s",
        since=t0,
        until=t0 + timedelta(hours=1),
        made=t0 + timedelta(hours=1),
        software_version="0.1.0",
        config_path=None,
        config_digest="abcdef1234567890",
        scans=(scan,),
    )
    files = write_summary(summary, tmp_path / "out", tz=UTC)
    assert [p.name for p in files.images] == ["quicklook_forward.png"]
    html = files.html.read_text(encoding="utf-8")
    assert "gone.png" in html  # in the problem said, not as an image
    assert _parse(files.html).images == [images[0].href]
    assert "![gone]" not in files.markdown.read_text(encoding="utf-8")
    # 1 ‰ of failures is not rounded away, nor is the OK share rounded up to 100 %
    assert "OK &gt; 99.9 %, failed &lt; 0.1 %" in html
    assert "30 min, 6 lines/h" in html  # 3 intervals in 30 min


def test_page_model_helpers() -> None:
    """Captions from product names; which images show (a trace's live picture until its
    quick-look exists); hrefs are relative, safe and percent-encoded; a
    scan's rate is (lines − 1) per hour of its duration, none for one line; an empty
    window says so."""
    assert image_caption("quicklook_backward.png") == "quick-look, backward trace"
    assert image_caption("vector_forward.png") == "vector field, forward trace"
    assert image_caption("odd_name.png") == "odd name"
    assert image_caption("live_forward.png") == "live picture, forward trace"
    # a running scan shows its live picture; once its quick-look is made, that instead
    folder = ["vector_forward.png", "live_backward.png", "live_forward.png", "x.png"]
    assert images_shown(folder) == [
        "live_backward.png",
        "live_forward.png",
        "vector_forward.png",
        "x.png",
    ]
    assert images_shown([*folder, "quicklook_forward.png"]) == [
        "quicklook_forward.png",
        "live_backward.png",
        "vector_forward.png",
        "x.png",
    ]
    href = image_href("summary-x", 3, "a b/../c", "q l.png")
    assert href == "summary-x_files/03-a_b_.._c/q_l.png"
    assert not Path(unquote(href)).is_absolute()
    t0 = datetime(2026, 3, 2, tzinfo=UTC)
    args: dict[str, Any] = {
        "scan_id": "s",
        "store": Path("s.zarr"),
        "profile": None,
        "n_lines_planned": 10,
        "pixels_done": 0,
        "fit_fractions": {},
    }
    one = scan_summary(lines_done={"forward": 1}, first_commit=t0, last_commit=t0, **args)
    assert (one.duration_s, one.rate_lines_per_h) == (0.0, None)
    many = scan_summary(
        lines_done={"forward": 5}, first_commit=t0, last_commit=t0 + timedelta(hours=2), **args
    )
    assert many.rate_lines_per_h == pytest.approx(2.0)
    empty = NightSummary("s", t0, t0 + timedelta(hours=12), t0, "0.1.0", None, "d" * 16, ())
    assert "no scan had a line or an alert in this window" in render_html(empty, UTC)
    assert render_markdown(empty, UTC).startswith(
        "# Scans from 2026-03-02T00:00:00+00:00 to 2026-03-02T12:00:00+00:00\n"
    )
