"""Writing tally files (for tests and demonstrations; the daemon only reads them)."""

from __future__ import annotations

import os
from datetime import UTC
from pathlib import Path

from strayline.lines import ScanLine


def tally_text(line: ScanLine) -> str:
    """A line as the text of a tally file (numbers written with ``repr``: exact)."""

    def row(key: str, values: object) -> str:
        return " ".join([key, *(repr(float(v)) for v in values)])  # type: ignore[attr-defined]

    def iso(moment: object) -> str:
        return moment.astimezone(UTC).isoformat(timespec="microseconds")  # type: ignore[attr-defined]

    rows = [
        "tally 1",
        f"scan {line.scan_id}",
        f"line {line.line_index} {line.direction} of {line.n_lines_planned}",
        f"time {iso(line.start_time)} {iso(line.end_time)}",
        row("dwell_s", [line.dwell_s]),
        row("nv_rad", [line.nv_theta_rad, line.nv_phi_rad]),
        row("y_m", [line.y_m]),
        row("freq_hz", line.freq_hz),
        row("x_m", line.x_m),
        *(row("counts", pixel) for pixel in line.counts),
        "end",
    ]
    return "\n".join(rows) + "\n"


def write_tally(line: ScanLine, path: Path) -> Path:
    """Write a line as a tally file: a temporary name, then renamed into place."""
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(tally_text(line), encoding="utf-8")
    os.replace(tmp, path)
    return path
