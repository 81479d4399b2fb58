"""``strayline demo``: the demo instrument and the real daemon, side by side, in a folder.

The whole flow of a lab, with no hardware:

1. calibrate the tip: the demo instrument (:mod:`demo_stream`, imported lazily: strayline
   never depends on it otherwise) scans a film edge of known sheet moment with the demo
   tip (``tip_id`` ``demo-tip``) into ``<folder>/calibration``; the daemon's pipeline
   processes it once (``strayline process``) and ``strayline calibrate`` fits the tip's
   stand-off, kept in the state folder;
2. scan a sample: the instrument writes a short labyrinth-domain scan with one injected
   fault into ``<folder>/incoming``; the daemon — the same
   :class:`~strayline.service.Service` that runs under systemd — watches that folder,
   writes ``<folder>/output/<scan>.zarr`` and the alert log, and stops once every line is
   committed or quarantined (or a time limit passes);
3. products in physical units: with ``products.calibration: latest``, the sheet moment
   takes the calibrated stand-off and its 1σ.

A summary compares the calibration and the field map with the instrument's ground truth.
"""

from __future__ import annotations

import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import zarr

from strayline.config import Config, config_from_mapping
from strayline.logs import configure_logging

if TYPE_CHECKING:
    from strayline.pipeline import LinePipeline

__all__ = ["default_fault", "demo_config", "run_demo", "truth_agreement"]

_SCAN_ID = "demo-labyrinth"
_CALIBRATION_ID = "demo-calibration"
_TIP_ID = "demo-tip"


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
        # The demo tip's stand-off from its newest calibration (made before the scan), so
        # the sheet moment is made; the live picture redrawn often enough to watch a short
        # scan fill in.
        "products": {"calibration": "latest", "live_every_lines": 8},
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


def default_fault(lines: int, pixels: int) -> str:
    """The demo's fault: a tip crash two thirds down the scan, from the middle pixel on."""
    return f"tip_crash@{(2 * lines) // 3}:{pixels // 2}"


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
    """Run the demo; print where everything is and a short summary.

    Parameters
    ----------
    lines, pixels : int
        Scan size, >= 1 each.
    pace_s : float
        Seconds between lines written by the demo instrument (0: as fast as it can).
    fault : str or None
        Fault in the demo instrument's compact form; None for :func:`default_fault`.
    folder : Path or None
        Work folder (None: a new temporary one). It must not hold an earlier demo run.
    seed : int
        Photon-noise seed.
    time_limit_s : float
        The daemon stops after this long even if lines are missing (the summary says so).

    Returns
    -------
    int
        0 when every line was committed or quarantined, 1 when the time limit cut the run
        short, 2 when ``folder`` already holds a demo run (nothing is done then).

    Raises
    ------
    ValueError
        If ``fault`` cannot be parsed or the scan size is invalid.
    """
    import demo_stream as ds

    spec = fault if fault is not None else default_fault(lines, pixels)
    tip = ds.TipModel(tip_id=_TIP_ID)
    scan = ds.DemoConfig(
        scene=ds.labyrinth(),
        tip=tip,
        n_lines=lines,
        n_pixels=pixels,
        faults=(ds.parse_fault(spec),),
        seed=seed,
        scan_id=_SCAN_ID,
    )
    folder = (
        Path(folder) if folder is not None else Path(tempfile.mkdtemp(prefix="strayline-demo-"))
    )
    folder = folder.absolute()
    config = demo_config(folder)
    from strayline.store import store_path as scan_store_path

    store_path = scan_store_path(config.paths.output_root, _SCAN_ID)
    if store_path.exists():
        print(
            f"strayline demo: {folder} already holds a demo run ({store_path}); "
            "choose an empty folder or leave out --folder",
            file=sys.stderr,
        )
        return 2
    (folder / "incoming").mkdir(parents=True, exist_ok=True)
    truth_dir = folder / "truth"
    configure_logging(level="info", console="plain", json_file=config.logging.json_file)
    print(f"strayline demo: {lines} lines x {pixels} pixels, fault {spec}, in {folder}")
    _calibrate_tip(
        config,
        folder,
        truth_dir,
        ds.calibration_scan(seed, tip=tip, scan_id=_CALIBRATION_ID, tip_id=_TIP_ID),
    )
    from strayline.products import live_image_name, products_dir

    live = products_dir(config.paths.output_root, config.products.folder, _SCAN_ID)
    print(
        f"live picture {live / live_image_name('forward')} (redrawn every "
        f"{config.products.live_every_lines} lines: open it and watch the scan fill in)"
    )

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
    timed_out = threading.Event()
    service: Service | None = None

    def finished() -> bool:
        if failure:
            return True
        if time.monotonic() > deadline:
            timed_out.set()
            return True
        if not writer_done.is_set() or service is None:
            return False
        pipeline = service.pipeline
        return pipeline is not None and _accounted(pipeline, lines)

    service = Service(config, stop_when=finished)
    thread = threading.Thread(target=write, name="demo-instrument", daemon=True)
    thread.start()
    service.install_signal_handlers()
    service.run()
    thread.join(timeout=5.0)
    if failure:
        raise failure[0]
    _print_summary(config, truth_dir)
    if timed_out.is_set():
        print(f"stopped      after the time limit of {time_limit_s:g} s with lines missing")
        return 1
    return 0


def _calibrate_tip(config: Config, folder: Path, truth_dir: Path, scan: Any) -> None:
    """Step 1: scan the known film edge, process it once, calibrate the tip's stand-off."""
    import demo_stream as ds
    from strayline.pipeline import process_folder
    from strayline.products import calibrate_store, keep_calibration
    from strayline.store import store_path as scan_store_path

    ds.run_scan(scan, folder / "calibration", truth_dir)
    process_folder(config, folder / "calibration")
    made = calibrate_store(
        scan_store_path(config.paths.output_root, scan.scan_id), model="film-edge"
    )
    record, _ = keep_calibration(made, config.paths.state_dir)
    params = scan.scene.params
    print(
        f"calibration  {record.summary()}\n"
        f"             truth d = {scan.tip.standoff_m * 1e9:.2f} nm, M_s t = "
        f"{params['sheet_moment_a'] * 1e3:.4g} mA; record {record.path}"
    )


def _print_sheet_moment(products: Path) -> None:
    """The forward trace's sheet moment and its 1σ, from the products report."""
    import json

    from strayline.products import REPORT_JSON

    try:
        report = json.loads((products / REPORT_JSON).read_text(encoding="utf-8"))
        vector = report["traces"]["forward"]["vector"]
        m, sigma = vector["m_z_a"], vector["m_z_sigma_a"]
    except (OSError, ValueError, KeyError, TypeError):
        return
    calibration = (report.get("calibration") or {}).get("used") or "none"
    print(
        f"sheet moment m_z 5-95 % {m['p5'] * 1e3:+.3f} to {m['p95'] * 1e3:+.3f} mA, "
        f"1 sigma median {sigma['median'] * 1e6:.2f} uA (calibration {calibration})"
    )


def _accounted(pipeline: LinePipeline, lines: int) -> bool:
    """Every line of the demo scan committed or quarantined."""
    done = pipeline.scan_progress().get(_SCAN_ID, (0, lines))[0]
    return done + pipeline.statistics().quarantined >= lines


def _read_map(group: Any, name: str) -> np.ndarray:
    array = group[name]
    if not isinstance(array, zarr.Array):
        raise KeyError(f"{name} is not an array in {group.store}")
    return np.asarray(array[:])


def _print_summary(config: Config, truth_dir: Path) -> None:
    from demo_stream.truth import load_truth
    from strayline.alerts import read_alert_log
    from strayline.products import products_dir
    from strayline.store import store_path as scan_store_path

    store_path = scan_store_path(config.paths.output_root, _SCAN_ID)
    events = read_alert_log(config.paths.alert_log, scan_id=_SCAN_ID)
    raised = [e for e in events if e.state == "raised"]
    print()
    print(f"store        {store_path}")
    print(f"log          {config.logging.json_file}")
    print(f"alert log    {config.paths.alert_log}")
    products = products_dir(config.paths.output_root, config.products.folder, _SCAN_ID)
    if products.exists():
        print(f"products     {products} (quick-look images, vector field, report)")
        _print_sheet_moment(products)
    if store_path.exists():
        group = zarr.open_group(store_path, mode="r")
        field_t = _read_map(group, "forward/field_nv_t")
        sigma_t = _read_map(group, "forward/field_nv_sigma_t")
        truth_t = load_truth(truth_dir, _SCAN_ID).map("field_nv_t", "forward")
        written = int(np.isfinite(field_t).any(axis=1).sum())
        print(f"lines        {written} written")
        finite = field_t[np.isfinite(field_t)]
        if finite.size:
            print(
                f"field        {finite.min() * 1e3:+.3f} to {finite.max() * 1e3:+.3f} mT along "
                "the NV axis"
            )
            agreement = truth_agreement(field_t, sigma_t, truth_t)
            print(f"vs truth     {agreement:.1%} of pixels within 3 sigma")
    else:
        print("lines        0 written (no store)")
    print(f"alerts       {len(raised)} raised")
    for event in raised:
        where = "" if event.line_index is None else f"line {event.line_index:>4}  "
        print(f"  {where}{event.severity:<8} {event.rule}: {event.message}")
