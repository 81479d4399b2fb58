"""Reprocessing an archive: ``strayline process`` with 1 worker against N on this machine.

Run: ``/work/venv/bin/python benchmarks/reprocess_throughput.py [--scans 20] [--lines 32]
[--pixels 256] [--workers 2] [--repeats 2]``.

An archive of ``--scans`` demo scans (one folder each, 201 frequencies, products off) is
processed into a fresh output folder by :func:`strayline.pipeline.process_folder`, exactly
as the command runs it: with ``--workers 1`` (the scans one after another in this process,
on one core), then with ``--workers N`` (an embedded Dask cluster of N single-threaded
worker processes, its start included). For reference, the same scans one after another in
one process with the fit kernels threaded over every core (what one daemon does with a
scan: only the fit, about half of a line's time, is parallel there). Each figure is the
best of ``--repeats`` runs (wall clock). The stores of the runs are compared bit for bit.

Printed: wall time and lines/s of each, their ratio (the speed-up), the cluster's start
and shut-down cost (measured alone), the cost of one scan task (the one-worker run's time
per scan), and from these a paper estimate for an archive of 10,000 such scans on a cluster
of 10 nodes: the tasks spread evenly over every worker at the parallel efficiency measured
here (speed-up / workers), plus one cluster start. The estimate assumes the archive's
storage keeps up (a shared file system serving 10 nodes may not); say so when quoting it.
No assertions: the figures depend on the machine and on what else runs on it.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import structlog
import yaml
import zarr

import demo_stream as ds
from strayline.config import load_config
from strayline.pipeline import default_workers, process_folder
from strayline.pipeline._cluster import fit_threads
from strayline.pipeline.folder import process_scan_files, scan_tasks
from strayline.store import MAP_NAMES

ARCHIVE_SCANS, CLUSTER_NODES = 10_000, 10


def write_config(work: Path) -> Path:
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "logging": {"console": "off"},
        "products": {"enabled": False},
        "alerts": {"console": False},
    }
    path = work / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def render(work: Path, scans: int, lines: int, pixels: int) -> None:
    for i in range(scans):
        config = ds.DemoConfig(n_lines=lines, n_pixels=pixels, seed=i, scan_id=f"arch{i:03d}")
        ds.run_scan(config, work / "incoming", work / "truth", pace_s=0.0)


def fresh(work: Path) -> None:
    for name in ("output", ".strayline"):
        shutil.rmtree(work / name, ignore_errors=True)


def timed_pass(work: Path, workers: int) -> float:
    """One ``process`` pass with ``workers`` cores into a fresh output folder."""
    fresh(work)
    config = load_config(work / "strayline.yaml")
    started = time.perf_counter()
    summary = process_folder(config, work / "incoming", workers=workers)
    wall = time.perf_counter() - started
    if summary.written != summary.files:
        raise SystemExit(f"only {summary.written} of {summary.files} lines written")
    return wall


def timed_threaded(work: Path, cores: int) -> float:
    """The scans one after another in this process, the fit kernels on ``cores`` threads."""
    fresh(work)
    config = load_config(work / "strayline.yaml")
    root = work / "incoming"
    started = time.perf_counter()
    with fit_threads(cores):
        for _, files in scan_tasks(config, root):
            process_scan_files(config, root, files)
    return time.perf_counter() - started


def cluster_cost(workers: int) -> float:
    """Start and shut down an embedded cluster of ``workers`` processes, doing nothing."""
    from distributed import Client, LocalCluster

    started = time.perf_counter()
    with (
        LocalCluster(
            n_workers=workers, threads_per_worker=1, dashboard_address=None, silence_logs=40
        ) as cluster,
        Client(cluster) as client,
    ):
        client.submit(os.getpid).result()
    return time.perf_counter() - started


def stores(work: Path) -> dict[str, np.ndarray]:
    out = {}
    for path in sorted((work / "output").glob("*.zarr")):
        group = zarr.open_group(path, mode="r")
        for direction in ("forward", "backward"):
            for name in MAP_NAMES:
                out[f"{path.name}/{direction}/{name}"] = group[f"{direction}/{name}"][:]
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--scans", type=int, default=20)
    parser.add_argument("--lines", type=int, default=32)
    parser.add_argument("--pixels", type=int, default=256)
    parser.add_argument("--workers", type=int, default=default_workers())
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    structlog.configure(logger_factory=structlog.ReturnLoggerFactory())  # no per-line output
    work = Path(tempfile.mkdtemp(prefix="strayline-reprocess-"))
    try:
        write_config(work)
        render(work, args.scans, args.lines, args.pixels)
        timed_pass(work, 1)  # compile and cache the kernels, warm the file cache
        one = min(timed_pass(work, 1) for _ in range(args.repeats))
        reference = stores(work)
        threaded = min(timed_threaded(work, default_workers()) for _ in range(args.repeats))
        many = min(timed_pass(work, args.workers) for _ in range(args.repeats))
        same = stores(work)
        identical = reference.keys() == same.keys() and all(
            np.array_equal(reference[k], same[k], equal_nan=True) for k in reference
        )
        start = min(cluster_cost(args.workers) for _ in range(args.repeats))
    finally:
        shutil.rmtree(work, ignore_errors=True)

    lines = args.scans * args.lines
    speedup = one / many
    efficiency = speedup / args.workers
    per_scan = one / args.scans
    print(
        f"archive: {args.scans} scans x {args.lines} lines x {args.pixels} px x 201 freqs "
        f"({lines} lines); {default_workers()} cores here"
    )
    print(f"--workers 1 (one core)              : {one:7.2f} s  {lines / one:7.1f} lines/s")
    print(
        f"--workers {args.workers} ({args.workers} worker processes)    : {many:7.2f} s  "
        f"{lines / many:7.1f} lines/s  (stores identical to --workers 1's: {identical})"
    )
    print(
        f"one process, fit on {default_workers()} cores (reference): {threaded:7.2f} s  "
        f"{lines / threaded:7.1f} lines/s"
    )
    print(
        f"speed-up of --workers {args.workers} over --workers 1: {speedup:.2f}x (parallel "
        f"efficiency {efficiency:.0%}); over one process with threaded fits: "
        f"{threaded / many:.2f}x"
    )
    print(
        f"embedded cluster start + stop alone: {start:.2f} s "
        f"(counted in the {args.workers}-worker time)"
    )
    print(f"one scan task: {per_scan:.2f} s ({args.lines} lines of {args.pixels} px)")
    for cores in (16, 64):
        slots = CLUSTER_NODES * cores
        estimate = start + ARCHIVE_SCANS * per_scan / (slots * efficiency)
        print(
            f"paper estimate, {ARCHIVE_SCANS} such scans on {CLUSTER_NODES} nodes x {cores} "
            f"cores ({slots} workers at {efficiency:.0%}): {estimate / 60:.1f} min "
            f"(one worker: {ARCHIVE_SCANS * per_scan / 3600:.1f} h)"
        )


if __name__ == "__main__":
    main()
