"""Soak: thousands of lines through the real daemon at full speed; memory, files, threads.

Run: ``/work/venv/bin/python benchmarks/soak.py [--lines 5000] [--lines-per-scan 500]
[--pixels 64] [--no-products]``.

The demo instrument writes ``--lines`` line files at pace 0 (as fast as it can) into the
watched folder, as consecutive scans of ``--lines-per-scan`` lines, while ``strayline run``
processes them. Every 2 s the daemon's resident memory (VmRSS) and thread count are read
from ``/proc/<pid>/status`` and its open file descriptors counted in ``/proc/<pid>/fd``,
together with the lines committed so far (from the stores' ledgers).

Printed: the samples at start (ready, before any line), after warm-up (the first 10 % of
the lines and the first finished scan with its products: imports, compiled kernels and
caches in place), in the middle and at the end;
RSS growth after warm-up as a ratio (goal: below 10 %); descriptor and thread counts at
warm-up, end and their maxima (goal: no growth); throughput in lines/s over the whole run
and over its second half. Scan products are made once per finished scan unless
``--no-products``. No assertions.
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import yaml

import demo_stream as ds

LEDGER = Path("ledger") / "records.jsonl"  # the store's ledger file (strayline.store._layout)


@dataclass(frozen=True)
class Sample:
    """One look at the daemon process."""

    t_s: float
    lines: int
    rss_mib: float
    threads: int
    fds: int


def proc_sample(pid: int, t_s: float, lines: int) -> Sample:
    """VmRSS and Threads from /proc/<pid>/status (proc(5)), open fds from /proc/<pid>/fd."""
    fields = {}
    for text in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = text.partition(":")
        fields[key] = value.strip()
    rss_kib = int(fields["VmRSS"].split()[0])
    fds = len(os.listdir(f"/proc/{pid}/fd"))
    return Sample(t_s, lines, rss_kib / 1024, int(fields["Threads"]), fds)


def committed(output: Path) -> int:
    """Commit records in every store's ledger below ``output`` (cheap: counts bytes)."""
    total = 0
    for ledger in output.glob(f"*.zarr/{LEDGER}"):
        try:
            total += ledger.read_bytes().count(b'"event":"commit"')
        except FileNotFoundError:
            continue
    return total


def write_config(folder: Path, products: bool) -> Path:
    data = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "watch": {"mode": "native", "settle_s": 0.5},
        "logging": {"console": "off", "json_file": "daemon.jsonl"},
        "alerts": {"console": False},
        "products": {"enabled": products},
    }
    (folder / "incoming").mkdir(parents=True, exist_ok=True)
    path = folder / "strayline.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    return path


def count_events(log: Path, name: str) -> int:
    needle = f'"event": "{name}"'
    return sum(needle in text for text in log.read_text(encoding="utf-8").splitlines())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--lines", type=int, default=5000, help="lines in all (default 5000)")
    parser.add_argument(
        "--lines-per-scan", type=int, default=500, help="lines per scan (default 500)"
    )
    parser.add_argument("--pixels", type=int, default=64, help="pixels per line (default 64)")
    parser.add_argument("--no-products", action="store_true", help="no scan products")
    args = parser.parse_args()
    n_scans = -(-args.lines // args.lines_per_scan)

    with tempfile.TemporaryDirectory(prefix="strayline-soak-") as folder:
        work = Path(folder)
        config = write_config(work, products=not args.no_products)
        env = {k: v for k, v in os.environ.items() if k not in ("NOTIFY_SOCKET",)}
        proc = subprocess.Popen(
            [sys.executable, "-m", "strayline", "run", "--config", str(config)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            env=env,
        )
        log = work / "daemon.jsonl"
        while not (log.exists() and "service_ready" in log.read_text()):
            if proc.poll() is not None:
                raise SystemExit(f"the daemon exited with {proc.returncode}")
            time.sleep(0.05)
        t0 = time.monotonic()
        samples = [proc_sample(proc.pid, 0.0, 0)]

        def write_all() -> None:
            left = args.lines
            for k in range(n_scans):
                n = min(args.lines_per_scan, left)
                left -= n
                scan = ds.DemoConfig(
                    n_lines=n, n_pixels=args.pixels, seed=100 + k, scan_id=f"soak-{k:03d}"
                )
                ds.run_scan(scan, work / "incoming", work / "truth", pace_s=0.0)

        writer = threading.Thread(target=write_all, daemon=True)
        writer.start()
        first_commit_s = None
        try:
            while True:
                time.sleep(2.0)
                if proc.poll() is not None:
                    raise SystemExit(f"the daemon exited with {proc.returncode}")
                done = committed(work / "output")
                now = time.monotonic() - t0
                if first_commit_s is None and done > 0:
                    first_commit_s = now
                samples.append(proc_sample(proc.pid, now, done))
                print(
                    f"  {now:7.1f} s  {done:5d} lines  RSS {samples[-1].rss_mib:6.1f} MiB  "
                    f"threads {samples[-1].threads:3d}  fds {samples[-1].fds:4d}",
                    flush=True,
                )
                if done >= args.lines:
                    break
        finally:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
            code = proc.wait(timeout=300)
        writer.join(timeout=60)
        products = count_events(log, "products_written")
        failures = count_events(log, "line_failed") + count_events(log, "line_quarantined")

    end = samples[-1]
    # Warm-up: the first 10 % of the lines and the first scan with its products (the
    # first products import the plotting library once).
    warm_lines = max(0.1 * args.lines, min(args.lines_per_scan + 1, args.lines))
    warm = next(s for s in samples if s.lines >= warm_lines)
    mid = next(s for s in samples if s.lines >= 0.5 * args.lines)
    half_s = next(s for s in samples if s.lines >= 0.5 * args.lines)
    print(
        f"soak: {args.lines} lines of {args.pixels} px x 201 freqs in {n_scans} scans, "
        f"products {'off' if args.no_products else 'on'} ({products} written); exit code "
        f"{code}; {failures} lines failed or quarantined; {os.cpu_count()} CPUs, load "
        f"average {os.getloadavg()[0]:.1f} at the end"
    )
    for name, s in (("start", samples[0]), ("warm-up", warm), ("middle", mid), ("end", end)):
        print(
            f"  {name:8s} {s.t_s:7.1f} s {s.lines:5d} lines  RSS {s.rss_mib:6.1f} MiB  "
            f"threads {s.threads:3d}  fds {s.fds:4d}"
        )
    after = [s for s in samples if s.lines >= warm.lines]
    print(
        f"  RSS after warm-up: end/warm-up = {end.rss_mib / warm.rss_mib:.3f} "
        f"(growth {100 * (end.rss_mib / warm.rss_mib - 1):+.1f} %), max "
        f"{max(s.rss_mib for s in after):.1f} MiB"
    )
    print(
        f"  fds warm-up {warm.fds} -> end {end.fds} (max {max(s.fds for s in after)}); "
        f"threads warm-up {warm.threads} -> end {end.threads} "
        f"(max {max(s.threads for s in after)})"
    )
    total_s = end.t_s - (first_commit_s or 0.0)
    print(
        f"  throughput {end.lines / end.t_s:.1f} lines/s from ready to the last sample "
        f"({end.t_s:.0f} s); second half {(end.lines - half_s.lines) / (end.t_s - half_s.t_s):.1f}"
        f" lines/s; from the first commit {end.lines / total_s:.1f} lines/s"
    )


if __name__ == "__main__":
    main()
