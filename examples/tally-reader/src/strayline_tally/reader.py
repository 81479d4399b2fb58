"""The tally reader: text, one entry per row (``key value...``), described in README.md;
``counts`` rows, one per pixel; a last row ``end`` says the file is complete."""

import hashlib
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np

from strayline.errors import LineFileError
from strayline.lines import HandedOver, LineLimits, ScanLine, check_line

_LIMITS = LineLimits()
# How messages name each field of the line: by the tally file's own entries.
_NAMES = {k: f"entry '{k}'" for k in ("dwell_s", "freq_hz", "x_m", "y_m")} | {
    "scan_id": "entry 'scan'", "line_index": "entry 'line'", "direction": "entry 'line'",
    "start_time": "entry 'time'", "end_time": "entry 'time'", "counts": "rows 'counts'",
    "nv_theta_rad": "entry 'nv_rad'", "nv_phi_rad": "entry 'nv_rad'",
}  # fmt: skip


def _entries(path: Path, text: str) -> tuple[dict[str, list[str]], list[list[str]]]:
    entries: dict[str, list[str]] = {}
    counts: list[list[str]] = []
    for row in text.splitlines()[1:]:
        key, *values = row.split()
        if key == "counts":
            counts.append(values)
        elif key != "end":
            entries[key] = values
    for key, size in (("scan", 1), ("line", 4), ("time", 2), ("dwell_s", 1), ("nv_rad", 2)):
        if len(entries.get(key, [])) != size:
            found = " ".join(entries[key]) if key in entries else "no such entry"
            raise LineFileError(path, f"entry '{key}'", f"{size} value(s)", repr(found))
    return entries, counts


def _numbers(path: Path, key: str, values: list[str] | list[list[str]]) -> np.ndarray:
    try:
        return np.array(values, dtype=np.float64)
    except ValueError as error:
        raise LineFileError(path, f"entry '{key}'", "numbers", str(error)) from None


def read_tally(path: Path, *, limits: LineLimits = _LIMITS) -> ScanLine:
    """Read one tally file into a checked line (errors name the entry)."""
    data = path.read_bytes()
    entries, counts = _entries(path, data.decode("utf-8"))
    index, direction, _, planned = entries["line"]
    nv_rad = _numbers(path, "nv_rad", entries["nv_rad"])
    try:
        start, end = (datetime.fromisoformat(t) for t in entries["time"])
        line_index, n_lines = int(index), int(planned)
    except ValueError as error:
        raise LineFileError(path, "entry 'line'", "numbers, ISO times", str(error)) from None
    line = ScanLine(
        source=path,
        scan_id=entries["scan"][0],
        line_index=line_index,
        n_lines_planned=n_lines,
        direction=direction,  # type: ignore[arg-type]  # check_line checks it
        start_time=start,
        end_time=end,
        dwell_s=float(_numbers(path, "dwell_s", entries["dwell_s"])[0]),
        nv_theta_rad=float(nv_rad[0]),
        nv_phi_rad=float(nv_rad[1]),
        freq_hz=_numbers(path, "freq_hz", entries.get("freq_hz", [])),
        counts=_numbers(path, "counts", counts),
        x_m=_numbers(path, "x_m", entries.get("x_m", [])),
        y_m=float(_numbers(path, "y_m", entries.get("y_m", ["nan"]))[0]),
        sha256=hashlib.sha256(data).hexdigest(),
    )
    return check_line(line, limits=limits, names=_NAMES)


@dataclass(frozen=True)
class TallyReader:
    name: str = "tally"
    patterns: tuple[str, ...] = ("*.tally",)
    growing: bool = False
    summary: str = "one 'tally' text file per line (the example plug-in)"

    def check(self, path: Path) -> str | None:
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as error:
            return f"{path.name}: cannot be read as text ({error})"
        if not text.startswith("tally 1\n"):
            return f"{path.name}: does not start with 'tally 1'"
        return None if text.endswith("end\n") else f"{path.name}: no 'end' row yet"

    def read(
        self, path: Path, *, limits: LineLimits = _LIMITS, handed_over: HandedOver | None = None
    ) -> Iterator[ScanLine]:
        yield read_tally(Path(path), limits=limits)


TALLY_READER = TallyReader()
