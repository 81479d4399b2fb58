"""Coverage of the tip calibration's error bars on demo calibration scans, through the
whole chain: spectra → ODMR fits → field → store → ``calibrate_store``.

Run: ``.venv/bin/python benchmarks/calibration_coverage.py [--seeds 100] [--first 1000]
[--lines 32] [--pixels 64] [--model film-edge]``.

Each seed draws a calibration scan (:func:`demo_stream.calibration_scan`: a sharp film
edge of known M_s t at a stand-off d drawn from 30–120 nm, any direction, the default
tip and signal), renders its spectra with Poisson noise, runs them through the daemon's
pipeline (:class:`strayline.pipeline.LinePipeline`, products off) and fits the store's
map with :func:`strayline.products.calibrate_store`. Printed:

- per d bin (30–60, 60–90, 90–120 nm) and overall: seeds, the fraction with |z| < 2 and
  the rms of z = (fitted − true)/σ for d and for M_s t (the issue asks ≥ 95 % within 2σ
  and rms z within 0.8–1.2), the median σ_d, the median χ²_red and how often σ was
  scaled by it;
- the same for a 2-D fit of the noise-free truth map with Gaussian noise at the store's
  σ map, as the baseline measured in the same run: what the fit alone does when the field
  errors are exactly what the σ map says; a gap between the two is the ODMR fit's σ (or
  its field inversion) and not the calibration fit.

Seeds from 1000 on are held out (the tests use 0–31 on synthetic maps). No assertions: a
measurement to track.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import structlog

import demo_stream as ds
from strayline.config import config_from_mapping
from strayline.physics import nv_axis
from strayline.physics.structure_fit import fit_structure_map
from strayline.pipeline import LinePipeline
from strayline.products import calibrate_store
from strayline.store import open_store_reader

_BINS_NM = ((30, 60), (60, 90), (90, 120))


def _pipeline(root: Path) -> LinePipeline:
    config = config_from_mapping(
        {
            "paths": {"watch_root": "in", "output_root": "out"},
            "logging": {"console": "off"},
            "alerts": {"console": False},
            "products": {"enabled": False},
        },
        base_dir=root,
    )
    return LinePipeline(config)


def _trial(
    pipeline: LinePipeline, root: Path, seed: int, *, shape: tuple[int, int], model: str
) -> dict[str, float]:
    """One seed: the chain's and the baseline's z-scores, σ_d and χ²_red."""
    lines, pixels = shape
    scan = ds.calibration_scan(seed, n_lines=lines, n_pixels=pixels, scan_id=f"cal-{seed}")
    ds.run_scan(scan, root / "in", root / "truth")
    for path in sorted((root / "in" / scan.scan_id).glob("line_*.h5")):
        pipeline.process(path)
    store = root / "out" / f"{scan.scan_id}.zarr"
    made = calibrate_store(store, model=model)  # type: ignore[arg-type]
    record = made.record
    d_true = scan.tip.standoff_m
    m_true = float(scan.scene.params["sheet_moment_a"])

    # Baseline: the truth map with Gaussian noise at the store's σ map, same mask.
    reader = open_store_reader(store)
    sigma = np.asarray(reader.read_array("field_nv_sigma_t", "forward"), dtype=np.float64)
    x = ds.scan_axis_m(pixels, scan.pixel_m)
    y = ds.scan_axis_m(lines, scan.pixel_m)
    tip = scan.tip
    truth = np.tensordot(
        nv_axis(tip.nv_theta_rad, tip.nv_phi_rad),
        ds.render_field_t(scan.scene, x, y, d_true),
        axes=(0, 0),
    ) + np.dot(nv_axis(tip.nv_theta_rad, tip.nv_phi_rad), tip.bias_field_t)  # type: ignore[arg-type]
    rng = np.random.default_rng(seed + 7_000_000)
    noisy = np.where(np.isfinite(sigma), truth + rng.normal(size=truth.shape) * sigma, np.nan)
    base = fit_structure_map(
        noisy,
        sigma,
        x,
        y,
        model=model,  # type: ignore[arg-type]
        nv_theta_rad=tip.nv_theta_rad,
        nv_phi_rad=tip.nv_phi_rad,
    )
    strength = "current_a" if model == "wire" else "sheet_moment_a"
    return {
        "d_nm": d_true * 1e9,
        "z_d": (record.standoff_m - d_true) / record.standoff_sigma_m,
        "z_m": (record.values[strength] - m_true) / record.sigmas[strength],
        "sigma_d_nm": record.standoff_sigma_m * 1e9,
        "chi2_red": float(record.fit["chi2_red"]),
        "scaled": float(bool(record.fit["sigma_scaled"])),
        "base_z_d": (base.values["standoff_m"] - d_true) / base.sigmas["standoff_m"],
        "base_z_m": (base.values[strength] - m_true) / base.sigmas[strength],
    }


def _line(label: str, rows: list[dict[str, float]], prefix: str = "") -> str:
    if not rows:
        return f"{label:<12} no seeds"
    z_d = np.array([r[f"{prefix}z_d"] for r in rows])
    z_m = np.array([r[f"{prefix}z_m"] for r in rows])
    text = (
        f"{label:<12} n={len(rows):>4}  d: within 2σ {np.mean(np.abs(z_d) < 2):6.1%}, "
        f"rms z {np.sqrt(np.mean(z_d**2)):5.2f}, mean z {np.mean(z_d):+5.2f}   "
        f"M_s t: within 2σ {np.mean(np.abs(z_m) < 2):6.1%}, rms z {np.sqrt(np.mean(z_m**2)):5.2f}"
    )
    if not prefix:
        text += (
            f"   σ_d median {np.median([r['sigma_d_nm'] for r in rows]):.2f} nm, χ²_red median "
            f"{np.median([r['chi2_red'] for r in rows]):.2f} (σ scaled in "
            f"{np.mean([r['scaled'] for r in rows]):.0%})"
        )
    return text


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=100, help="calibration scans")
    parser.add_argument("--first", type=int, default=1000, help="first seed (held out)")
    parser.add_argument("--lines", type=int, default=32)
    parser.add_argument("--pixels", type=int, default=64)
    parser.add_argument("--model", choices=("film-edge",), default="film-edge")
    structlog.configure(logger_factory=structlog.ReturnLoggerFactory())  # no per-line output
    args = parser.parse_args()
    rows: list[dict[str, float]] = []
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        pipeline = _pipeline(root)
        try:
            for seed in range(args.first, args.first + args.seeds):
                rows.append(
                    _trial(pipeline, root, seed, shape=(args.lines, args.pixels), model=args.model)
                )
        finally:
            pipeline.close()
    print(
        f"{len(rows)} calibration scans of {args.lines} x {args.pixels} pixels, seeds "
        f"{args.first}–{args.first + args.seeds - 1}, in {time.perf_counter() - started:.0f} s"
    )
    print("through the pipeline (ODMR fits → field → store → calibrate):")
    for lo, hi in _BINS_NM:
        subset = [r for r in rows if lo <= r["d_nm"] < hi]
        print(_line(f"d {lo}–{hi} nm", subset))
    print(_line("all", rows))
    print("baseline (truth map + Gaussian noise at the store's σ map, same fit):")
    print(_line("all", rows, prefix="base_"))


if __name__ == "__main__":
    main()
