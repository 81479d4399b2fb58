"""Line latency and sustained line rate of the real daemon (``strayline run``).

Run: ``/work/venv/bin/python benchmarks/line_latency.py [--lines 200] [--pace 0.6]
[--settle 2.0 0.1] [--burst 200]``.

For each watcher ``settle_s`` given, a fresh daemon watches a fresh folder and:

1. **latency** — ``--lines`` demo line files (256 pixels x 201 frequencies, one scan) are
   renamed into the watched scan folder one every ``--pace`` seconds (an atomic writer's
   last step); the time from each rename until that line's ``commit`` record is in the
   store's ledger (the moment the line is committed and visible to readers) is measured by
   tailing the ledger every 2 ms. Printed: median, p95 and max, and the median of the
   daemon's own fit + write time for a line (from its ``line_processed`` records) as the
   baseline the latency is made of.
2. **sustained rate** — ``--burst`` more line files of a second scan are renamed in all at
   once; the burst's lines over the time from the renames to the last commit is the
   sustained maximum line rate (not first-to-last commit: lines ready together are
   committed in groups, so commits come in clumps and that span would flatter it),
   printed in lines/s and as a multiple of a fast real instrument (one line per 5 s).

Scan products are turned off (they run once per finished scan, not per line). The demo
files are rendered before the daemon starts, so rendering does not compete for the CPU.
No assertions; the figures depend on the machine and on what else runs on it.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import yaml

import demo_stream as ds

INSTRUMENT_LINE_S = 5.0  # a fast real instrument: one line per 5 s
LEDGER = Path("ledger") / "records.jsonl"  # the store's ledger file (strayline.store._layout)


class LedgerTail:
    """Reads commit records appended to a store's ledger since the last call."""

    def __init__(self, store: Path) -> None:
        self.path = store / LEDGER
        self._offset = 0
        self._rest = b""

    def commits(self) -> list[dict[str, Any]]:
        """Commit records appended since the last call (none while the file is absent)."""
        try:
            with self.path.open("rb") as fh:
                fh.seek(self._offset)
                data = fh.read()
        except FileNotFoundError:
            return []
        self._offset += len(data)
        lines = (self._rest + data).split(b"\n")
        self._rest = lines.pop()
        out = []
        for raw in lines:
            record = json.loads(raw)
            if record.get("event") == "commit":
                out.append(record)
        return out


def write_config(folder: Path, settle_s: float) -> Path:
    """A daemon config watching ``folder/incoming`` with the given settle time."""
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "watch": {"mode": "native", "settle_s": settle_s, "give_up_s": max(60.0, 10 * settle_s)},
        "logging": {"console": "off", "json_file": "daemon.jsonl"},
        "products": {"enabled": False},
        "alerts": {"console": False},
    }
    (folder / "incoming").mkdir(parents=True, exist_ok=True)
    path = folder / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def start_daemon(config: Path) -> subprocess.Popen[bytes]:
    """``strayline run`` as a subprocess, outside systemd."""
    env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET", "WATCHDOG_USEC")}
    return subprocess.Popen(
        [sys.executable, "-m", "strayline", "run", "--config", str(config)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        env=env,
    )


def wait_ready(log: Path, proc: subprocess.Popen[bytes], timeout_s: float = 120.0) -> None:
    deadline = time.monotonic() + timeout_s
    while not (log.exists() and "service_ready" in log.read_text(encoding="utf-8")):
        if proc.poll() is not None or time.monotonic() > deadline:
            raise SystemExit(f"the daemon did not become ready (exit code {proc.poll()})")
        time.sleep(0.05)


def render(stage: Path, scan_id: str, n_lines: int, seed: int) -> list[Path]:
    """Demo line files (256 px x 201 frequencies) in ``stage/<scan_id>``, in line order."""
    config = ds.DemoConfig(n_lines=n_lines, n_pixels=256, seed=seed, scan_id=scan_id)
    ds.run_scan(config, stage, stage.parent / f"truth-{scan_id}", pace_s=0.0)
    return sorted((stage / scan_id).glob("line_*.h5"))


def percentile(values: list[float], q: float) -> float:
    """Linear-interpolation percentile (numpy's default method)."""
    ordered = sorted(values)
    pos = (len(ordered) - 1) * q / 100.0
    lo = int(pos)
    hi = min(lo + 1, len(ordered) - 1)
    return ordered[lo] + (ordered[hi] - ordered[lo]) * (pos - lo)


def run_one(work: Path, settle_s: float, n_lines: int, pace_s: float, burst: int) -> dict:
    """One daemon, one settle time: latency phase, then the burst phase."""
    config = write_config(work, settle_s)
    stage = work / "stage"
    lat_files = render(stage, "latency", n_lines, seed=1)
    burst_files = render(stage, "burst", burst, seed=2)
    incoming, output = work / "incoming", work / "output"
    proc = start_daemon(config)
    try:
        wait_ready(work / "daemon.jsonl", proc)
        # -- latency: one rename every pace_s, commit seen by tailing the ledger
        (incoming / "latency").mkdir()
        tail = LedgerTail(output / "latency.zarr")
        renamed: dict[int, float] = {}
        seen: dict[int, float] = {}
        next_s = time.monotonic()
        i = 0
        deadline = None
        while len(seen) < n_lines:
            now = time.monotonic()
            if i < n_lines and now >= next_s:
                src = lat_files[i]
                src.rename(incoming / "latency" / src.name)
                renamed[i] = time.monotonic()
                i += 1
                next_s += pace_s
                if i == n_lines:
                    deadline = time.monotonic() + 120.0
            for record in tail.commits():
                seen.setdefault(int(record["line_index"]), time.monotonic())
            if deadline is not None and time.monotonic() > deadline:
                raise SystemExit(f"only {len(seen)} of {n_lines} lines committed")
            if proc.poll() is not None:
                raise SystemExit(f"the daemon exited with {proc.returncode}")
            time.sleep(0.002)
        latency = [seen[k] - renamed[k] for k in range(n_lines)]

        # -- sustained rate: everything at once
        (incoming / "burst").mkdir()
        tail = LedgerTail(output / "burst.zarr")
        t0 = time.monotonic()
        for src in burst_files:
            src.rename(incoming / "burst" / src.name)
        t_renamed = time.monotonic() - t0
        commits: list[float] = []
        deadline = time.monotonic() + 600.0
        while len(commits) < burst:
            commits.extend(time.monotonic() for _ in tail.commits())
            if time.monotonic() > deadline or proc.poll() is not None:
                raise SystemExit(f"burst: only {len(commits)} of {burst} lines committed")
            time.sleep(0.005)
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=120)
    records = [json.loads(x) for x in (work / "daemon.jsonl").read_text().splitlines() if x]
    processed = [
        r["fit_s"] + r["write_s"]
        for r in records
        if r.get("event") == "line_processed" and r.get("scan") == "latency"
    ]
    return {
        "settle_s": settle_s,
        "latency_median_s": statistics.median(latency),
        "latency_p95_s": percentile(latency, 95),
        "latency_max_s": max(latency),
        "processing_median_s": statistics.median(processed),
        "burst_rename_s": t_renamed,
        "burst_first_commit_s": commits[0] - t0,
        "burst_rate_lines_per_s": burst / (commits[-1] - t0),
        "burst_total_s": commits[-1] - t0,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--lines", type=int, default=200, help="lines timed (default 200)")
    parser.add_argument(
        "--pace", type=float, default=0.6, help="seconds between renames (default 0.6)"
    )
    parser.add_argument(
        "--settle",
        type=float,
        nargs="+",
        default=[2.0, 0.1],
        help="watch.settle_s values to compare (default: 2.0, the config default, and 0.1)",
    )
    parser.add_argument("--burst", type=int, default=200, help="lines in the burst (default 200)")
    args = parser.parse_args()
    print(
        f"line latency: {args.lines} lines of 256 px x 201 freqs renamed in every "
        f"{args.pace:g} s; sustained rate: a burst of {args.burst} lines; "
        f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at start"
    )
    for settle_s in args.settle:
        with tempfile.TemporaryDirectory(prefix="strayline-latency-") as folder:
            result = run_one(Path(folder), settle_s, args.lines, args.pace, args.burst)
        rate = result["burst_rate_lines_per_s"]
        print(
            f"settle_s={settle_s:g}: latency median {result['latency_median_s']:.3f} s, "
            f"p95 {result['latency_p95_s']:.3f} s, max {result['latency_max_s']:.3f} s "
            f"(of which fit+write median {result['processing_median_s']:.3f} s; "
            f"latency = settle_s + {result['latency_median_s'] - settle_s:.3f} s); "
            f"sustained {rate:.1f} lines/s = {rate * INSTRUMENT_LINE_S:.0f}x an instrument at "
            f"{INSTRUMENT_LINE_S:g} s/line (burst of {args.burst}: first commit after "
            f"{result['burst_first_commit_s']:.2f} s, all after {result['burst_total_s']:.1f} s)"
        )
    print(f"load average at the end {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
