"""End-to-end line rate of the pipeline against its fitter alone, with a per-stage table.

Run: ``/work/venv/bin/python benchmarks/pipeline_throughput.py [--pixels 64 256 1024]
[--lines 96 48 16] [--repeats 2]``.

For each line width (demo scans, 201 frequencies, products off, durable commits as the
daemon runs them), measured side by side in one run on the same files:

- **fitter alone**: the files read beforehand, then ``fit_line`` + ``field_from_fit`` on
  each line with the scan's own fit model, and nothing else: the pace the pipeline aims
  for;
- **process** (grouped): ``strayline process DIR`` as the command runs it
  (:func:`strayline.pipeline.process_folder`: every line of the folder, in batches whose
  lines are committed as groups) into a fresh output folder;
- **one by one**: the same files through ``LinePipeline.process`` one at a time, each a
  group of one (what the daemon does when lines arrive one every few seconds).

Printed per width: lines/s of each, the ratio of each pipeline to the fitter alone, and
the pipeline's milliseconds per line by stage (read and check the file, fit and field,
store write and commit, metrics and rules with the rule-state save, and the rest), from
the timings the pipeline reports per line. Then the **fixed cost per line**: the
pipeline's time per line beyond the fitter's, fitted as a + b·pixels over the widths; a
is the cost a line pays whatever its width (store, ledger, rule state).

Each figure is the best of ``--repeats`` runs (wall clock), so that load from other
processes counts as little as possible. The fit kernels are compiled before timing (an
untimed fitter pass over each width's files). No
assertions: the figures depend on the machine and on what else runs on it.
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import structlog
import yaml

import demo_stream as ds
from strayline.config import load_config
from strayline.field import field_from_fit
from strayline.fit import fit_line
from strayline.lines import read_line_file
from strayline.pipeline import (
    LinePipeline,
    default_workers,
    fit_model_from_config,
    process_folder,
    zfs_rule,
)
from strayline.pipeline.folder import acquisition_order

STAGES = ("read_s", "fit_s", "write_s", "rules_s")


@dataclass
class Run:
    """One timed pass: wall time, lines, and the per-stage sums, s."""

    wall_s: float
    lines: int
    stages: dict[str, float]

    @property
    def rate(self) -> float:
        return self.lines / self.wall_s

    def ms_per_line(self, stage: str) -> float:
        return 1e3 * self.stages[stage] / self.lines


def write_config(work: Path, watch: Path, chunk_lines: int | None) -> Path:
    data: dict = {
        "paths": {
            "watch_root": str(watch),
            "output_root": str(work / "output"),
            "state_dir": str(work / "state"),
            "alert_log": str(work / "alerts.jsonl"),
        },
        "logging": {"console": "off"},
        "products": {"enabled": False},
        "alerts": {"console": False},
    }
    if chunk_lines is not None:
        data["store"] = {"chunk_lines": chunk_lines}
    path = work / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def render(stage: Path, scan_id: str, n_lines: int, n_pixels: int) -> list[Path]:
    config = ds.DemoConfig(n_lines=n_lines, n_pixels=n_pixels, seed=3, scan_id=scan_id)
    ds.run_scan(config, stage, stage.parent / f"truth-{scan_id}", pace_s=0.0)
    return sorted((stage / scan_id).glob("line_*.h5"), key=acquisition_order)


def fresh_output(work: Path) -> None:
    for name in ("output", "state"):
        shutil.rmtree(work / name, ignore_errors=True)
    (work / "alerts.jsonl").unlink(missing_ok=True)


def fitter_alone(config_path: Path, files: list[Path]) -> Run:
    config = load_config(config_path)
    model, zfs_for = fit_model_from_config(config), zfs_rule(config)
    lines = [read_line_file(p) for p in files]
    started = time.perf_counter()
    for line in lines:
        zfs_hz = zfs_for(line)
        fit = fit_line(line.freq_hz, line.counts, model, pair_center_hz=zfs_hz)
        field_from_fit(fit, zfs_hz=zfs_hz, sign=float(config.field.sign))
    wall = time.perf_counter() - started
    return Run(wall, len(lines), {"fit_s": wall})


def stages_from_log(log: list[dict]) -> dict[str, float]:
    processed = [r for r in log if r.get("event") == "line_processed"]
    return {stage: sum(float(r.get(stage, 0.0)) for r in processed) for stage in STAGES}


class LogCapture:
    """Collects the pipeline's structlog records in memory (the per-line timings)."""

    def __init__(self) -> None:
        self.records: list[dict] = []

    def __call__(self, _logger: object, _name: str, event: dict) -> dict:
        self.records.append(dict(event))
        raise structlog.DropEvent


def grouped(config_path: Path, folder: Path, work: Path, capture: LogCapture) -> Run:
    fresh_output(work)
    config = load_config(config_path)
    capture.records.clear()
    started = time.perf_counter()
    summary = process_folder(config, folder, workers=default_workers())  # the command's default
    wall = time.perf_counter() - started
    return Run(wall, summary.written, stages_from_log(capture.records))


def one_by_one(config_path: Path, files: list[Path], work: Path, capture: LogCapture) -> Run:
    fresh_output(work)
    config = load_config(config_path)
    capture.records.clear()
    pipeline = LinePipeline(config, root=files[0].parent.parent)
    try:
        started = time.perf_counter()
        for path in files:
            pipeline.process(path)
        wall = time.perf_counter() - started
    finally:
        pipeline.close()
    return Run(wall, len(files), stages_from_log(capture.records))


def best(runs: list[Run]) -> Run:
    return min(runs, key=lambda r: r.wall_s / r.lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--pixels", type=int, nargs="+", default=[64, 256, 1024])
    parser.add_argument("--lines", type=int, nargs="+", default=[96, 48, 16])
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument(
        "--chunk-lines", type=int, default=None, help="store.chunk_lines (default: the config's)"
    )
    args = parser.parse_args()
    if len(args.lines) != len(args.pixels):
        parser.error("--lines needs one count per --pixels value")
    capture = LogCapture()
    structlog.configure(processors=[capture])
    work = Path(tempfile.mkdtemp(prefix="strayline-throughput-"))
    try:
        watch = work / "incoming"
        config_path = write_config(work, watch, args.chunk_lines)
        rows = []
        for n_pixels, n_lines in zip(args.pixels, args.lines, strict=True):
            files = render(watch, f"px{n_pixels}", n_lines, n_pixels)
            fitter_alone(config_path, files)  # every kernel these lines need, compiled
            fit = best([fitter_alone(config_path, files) for _ in range(args.repeats)])
            group = best([grouped(config_path, watch, work, capture) for _ in range(args.repeats)])
            single = best(
                [one_by_one(config_path, files, work, capture) for _ in range(args.repeats)]
            )
            rows.append((n_pixels, fit, group, single))
            shutil.rmtree(watch / f"px{n_pixels}")
    finally:
        shutil.rmtree(work, ignore_errors=True)

    print(f"{'pixels':>6}  {'fitter':>8}  {'process':>8} {'ratio':>6}  {'1-by-1':>8} {'ratio':>6}")
    for n_pixels, fit, group, single in rows:
        print(
            f"{n_pixels:6d}  {fit.rate:6.1f}/s  {group.rate:6.1f}/s {group.rate / fit.rate:6.2f}"
            f"  {single.rate:6.1f}/s {single.rate / fit.rate:6.2f}"
        )
    print("\nms per line by stage (read, fit, store, rules, rest = wall - the four)")
    for mode in ("process", "1-by-1"):
        for n_pixels, _fit, group, single in rows:
            run = group if mode == "process" else single
            parts = [run.ms_per_line(s) for s in STAGES]
            rest = 1e3 * run.wall_s / run.lines - sum(parts)
            cells = "  ".join(f"{v:6.1f}" for v in [*parts, rest])
            print(f"{mode:>8} {n_pixels:5d} px: {cells}   total {1e3 / run.rate:6.1f}")
    pixels = np.array([r[0] for r in rows], dtype=float)
    for mode, pick in (("process", 2), ("1-by-1", 3)):
        beyond = np.array([1e3 / r[pick].rate - 1e3 / r[1].rate for r in rows])
        if len(rows) >= 2:
            slope, fixed = np.polyfit(pixels, beyond, 1)
            print(
                f"{mode}: beyond the fitter {fixed:.1f} ms per line + {1e3 * slope:.1f} µs "
                "per pixel (fixed cost per line = the first figure)"
            )


if __name__ == "__main__":
    main()
