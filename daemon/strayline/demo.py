"""``strayline demo``: the demo instrument and the real daemon, side by side, in a folder.

The demo instrument (:mod:`demo_stream`, imported lazily: strayline never depends on it
otherwise) writes a short labyrinth-domain scan with one injected fault into
``<folder>/incoming``; the daemon — the same :class:`~strayline.service.Service` that runs
under systemd — watches that folder, writes ``<folder>/output/<scan>.zarr`` and the alert
log, and stops once every line is committed. A summary compares the field map with the
instrument's ground truth.
"""

from __future__ import annotations

import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

from strayline.config import Config, config_from_mapping
from strayline.logs import configure_logging

__all__ = ["demo_config", "run_demo", "truth_agreement"]

_SCAN_ID = "demo-labyrinth"


def demo_config(folder: Path, *, settle_s: float = 0.2) -> Config:
    """A daemon config for a demo folder: watch ``incoming``, write ``output``."""
    data: dict[str, Any] = {
        "paths": {"watch_root": "incoming", "output_root": "output"},
        "watch": {
            "mode": "native",
            "settle_s": settle_s,
            "poll_interval_s": 0.5,
            "reconcile_interval_s": 5.0,
            "give_up_s": 30.0,
        },
        "logging": {"console": "plain", "json_file": "output/strayline.log.jsonl"},
        "service": {"status_interval_s": 5.0},
    }
    return config_from_mapping(data, base_dir=folder)


def truth_agreement(
    field_t: np.ndarray, sigma_t: np.ndarray, truth_t: np.ndarray, k: float = 3.0
) -> float:
    """Fraction of finite pixels whose field is within ``k``·σ of the truth."""
    ok = np.isfinite(field_t) & np.isfinite(sigma_t) & np.isfinite(truth_t)
    if not ok.any():
        return float("nan")
    return float(np.mean(np.abs(field_t[ok] - truth_t[ok]) <= k * sigma_t[ok]))


def run_demo(
    *,
    lines: int = 48,
    pixels: int = 128,
    pace_s: float = 0.25,
    fault: str | None = None,
    folder: Path | None = None,
    seed: int = 7,
    time_limit_s: float = 300.0,
) -> int:
    """Run the demo; print where everything is and a short summary. Returns 0."""
    import demo_stream as ds

    folder = (
        Path(folder) if folder is not None else Path(tempfile.mkdtemp(prefix="strayline-demo-"))
    )
    folder = folder.absolute()
    (folder / "incoming").mkdir(parents=True, exist_ok=True)
    truth_dir = folder / "truth"
    config = demo_config(folder)
    configure_logging(level="info", console="plain", json_file=config.logging.json_file)
    spec = fault if fault is not None else f"tip_crash@{(2 * lines) // 3}:{pixels // 2}"
    scan = ds.DemoConfig(
        scene=ds.labyrinth(),
        n_lines=lines,
        n_pixels=pixels,
        faults=(ds.parse_fault(spec),),
        seed=seed,
        scan_id=_SCAN_ID,
    )
    print(f"strayline demo: {lines} lines x {pixels} pixels, fault {spec}, in {folder}")

    from strayline.service import Service

    writer_done = threading.Event()
    failure: list[BaseException] = []

    def write() -> None:
        try:
            ds.run_scan(scan, folder / "incoming", truth_dir, pace_s=pace_s)
        except BaseException as error:  # reported below, never swallowed
            failure.append(error)
        finally:
            writer_done.set()

    deadline = time.monotonic() + time_limit_s
    service: Service | None = None

    def finished() -> bool:
        if time.monotonic() > deadline or failure:
            return True
        if not writer_done.is_set() or service is None:
            return False
        progress = service.pipeline.scan_progress().get(_SCAN_ID)
        return progress is not None and progress[0] >= lines

    service = Service(config, stop_when=finished)
    thread = threading.Thread(target=write, name="demo-instrument", daemon=True)
    thread.start()
    service.install_signal_handlers()
    service.run()
    thread.join(timeout=5.0)
    if failure:
        raise failure[0]
    _print_summary(folder, config, truth_dir)
    return 0


def _print_summary(folder: Path, config: Config, truth_dir: Path) -> None:
    import zarr

    from demo_stream.truth import load_truth
    from strayline.alerts import read_alert_log

    store_path = config.paths.output_root / f"{_SCAN_ID}.zarr"
    group = zarr.open_group(store_path, mode="r")
    field_t = np.asarray(group["forward/field_nv_t"][:])
    sigma_t = np.asarray(group["forward/field_nv_sigma_t"][:])
    truth = load_truth(truth_dir, _SCAN_ID)
    truth_t = truth.map("field_nv_t", "forward")
    events = read_alert_log(config.paths.alert_log, scan_id=_SCAN_ID)
    raised = [e for e in events if e.state == "raised"]
    written = int(np.isfinite(field_t).any(axis=1).sum())
    print()
    print(f"store        {store_path}")
    print(f"log          {config.logging.json_file}")
    print(f"alert log    {config.paths.alert_log}")
    print(f"lines        {written} written")
    finite = field_t[np.isfinite(field_t)]
    if finite.size:
        print(
            f"field        {finite.min() * 1e3:+.3f} to {finite.max() * 1e3:+.3f} mT along "
            "the NV axis"
        )
    print(f"vs truth     {truth_agreement(field_t, sigma_t, truth_t):.1%} of pixels within 3 sigma")
    print(f"alerts       {len(raised)} raised")
    for event in raised:
        print(f"  line {event.line_index:>4}  {event.severity:<8} {event.rule}: {event.message}")
