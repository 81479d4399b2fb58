"""Command line of the synthetic instrument: ``python -m demo_stream --help``.

Options take the units a person types (nm, mT, MHz, GHz, ms); they are converted to SI
here and nowhere else.
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from demo_stream.faults import FAULT_KINDS, Fault, fault_to_spec, parse_fault
from demo_stream.presets import PRESETS
from demo_stream.scenes import SCENES, make_scene
from demo_stream.tip import NV_100_PHI_RAD, NV_100_THETA_RAD, TipModel
from demo_stream.truth import truth_paths
from demo_stream.writer import LAYOUTS, DemoConfig, frequency_grid_hz, run_scan

__all__ = ["build_parser", "config_from_args", "main"]


def _key_value(text: str) -> tuple[str, float]:
    key, sep, value = text.partition("=")
    try:
        if not sep or not key:
            raise ValueError
        return key.strip(), float(value)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be KEY=NUMBER; found {text!r}") from None


def _fault(text: str) -> Fault:
    try:
        return parse_fault(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _freq_list(text: str) -> np.ndarray:
    try:
        return np.array([float(v) for v in text.split(",") if v.strip()]) * 1e9
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be comma-separated frequencies in GHz; found {text!r}"
        ) from None


class _Formatter(argparse.ArgumentDefaultsHelpFormatter, argparse.RawDescriptionHelpFormatter):
    """Option defaults shown once (not where the help states its own default, nor for an
    option without one), epilog kept as written."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        if "(default" in text or action.default in (None, [], False, argparse.SUPPRESS):
            return text
        return super()._get_help_string(action)


def _fault_help() -> str:
    lines = [
        "faults (--fault, repeatable): KIND@LINE[:PIXEL][-END_LINE][,KEY=VALUE...]",
        "  e.g. tip_crash@40:64   fluorescence_lost@60-70   acquisition_stalled@20,pause_s=5",
        "  LINE/PIXEL count from 0 and END_LINE is inclusive. Without END_LINE,",
        "  lost fluorescence, collapsed contrast and a tip crash persist to the end;",
        "  the other kinds act on LINE only. Parameters (SI units) and defaults:",
    ]
    for kind, params in FAULT_KINDS.items():
        defaults = ", ".join(f"{k}={v:g}" for k, v in params.items())
        lines.append(f"  {kind:<20} {defaults}")
    return "\n".join(lines)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (every option with its unit and default)."""
    p = argparse.ArgumentParser(
        prog="python -m demo_stream",
        description=(
            "Synthetic scanning-NV instrument: renders an invented sample, writes one "
            "scan-line file per completed line into OUT/<scan id>/ at a chosen pace, and "
            "the ground truth into TRUTH/ (outside the watched folder)."
        ),
        epilog=_fault_help(),
        formatter_class=_Formatter,
    )
    g = p.add_argument_group("sample and scan")
    g.add_argument(
        "--scene",
        choices=list(SCENES),
        default=None,
        help="invented sample (default: the one the signal preset's sweep suits)",
    )
    g.add_argument(
        "--scene-param",
        metavar="KEY=VALUE",
        type=_key_value,
        action="append",
        default=[],
        help="scene parameter in SI units, e.g. sheet_moment_a=5e-4 (repeatable)",
    )
    g.add_argument("--lines", type=int, default=64, help="lines (slow axis)")
    g.add_argument("--pixels", type=int, default=128, help="pixels per line (fast axis)")
    g.add_argument("--pixel-nm", type=float, default=30.0, help="pixel pitch, nm")
    g.add_argument("--trace-retrace", action="store_true", help="also write backward traces")
    g.add_argument("--scan-id", default="demo-0001", help="scan identifier and folder name")
    g.add_argument("--profile", default=None, help="sample-type profile name for the files")

    s = p.add_argument_group("signal")
    s.add_argument(
        "--signal",
        choices=sorted(PRESETS),
        default="strong",
        help="signal preset: count rate, dwell, dips and sweep (the options below override "
        "it): " + "; ".join(f"{name}: {preset.description}" for name, preset in PRESETS.items()),
    )

    f = p.add_argument_group("microwave sweep")
    f.add_argument(
        "--freq-ghz",
        nargs=3,
        metavar=("START", "STOP", "N"),
        default=None,
        help="uniform sweep from START to STOP GHz in N points [default: the signal preset's]",
    )
    f.add_argument(
        "--freq-list-ghz",
        type=_freq_list,
        default=None,
        metavar="F1,F2,...",
        help="explicit sweep, comma-separated GHz (strictly increasing)",
    )

    t = p.add_argument_group("tip and optics")
    t.add_argument("--standoff-nm", type=float, default=60.0, help="NV stand-off, nm")
    t.add_argument(
        "--nv-theta-deg", type=float, default=math.degrees(NV_100_THETA_RAD), help="NV polar angle"
    )
    t.add_argument(
        "--nv-phi-deg", type=float, default=math.degrees(NV_100_PHI_RAD), help="NV azimuth"
    )
    bias = t.add_mutually_exclusive_group()
    bias.add_argument(
        "--bias-mt",
        nargs=3,
        type=float,
        metavar=("BX", "BY", "BZ"),
        default=None,
        help="bias field in the scan frame, mT [default: 3 mT along the NV axis]",
    )
    bias.add_argument(
        "--bias-along-nv-mt", type=float, default=None, help="bias field along the NV axis, mT"
    )
    t.add_argument("--count-rate", type=float, default=None, help="PL count rate, counts/s")
    t.add_argument("--contrast", type=float, default=None, help="depth of each ODMR dip")
    t.add_argument("--linewidth-mhz", type=float, default=None, help="dip FWHM, MHz")
    t.add_argument("--dwell-ms", type=float, default=None, help="dwell per pixel and frequency, ms")
    t.add_argument(
        "--temperature-k",
        type=float,
        default=None,
        help="tip temperature, K (default: the signal preset's, else 295)",
    )
    t.add_argument("--strain-mhz", type=float, default=0.0, help="transverse splitting E, MHz")
    t.add_argument(
        "--hyperfine", choices=["none", "14N", "15N"], default=None, help="resolved hyperfine"
    )
    t.add_argument("--drift-per-hour", type=float, default=0.03, help="linear PL drift, 1/h")
    t.add_argument("--wobble", type=float, default=0.0, help="sinusoidal PL drift amplitude")
    t.add_argument("--wobble-period-s", type=float, default=1800.0, help="its period, s")

    r = p.add_argument_group("run")
    r.add_argument("--seed", type=int, default=0, help="photon-noise seed")
    r.add_argument("--pace-s", type=float, default=0.0, help="seconds per line (0 = flat out)")
    r.add_argument(
        "--fault", type=_fault, action="append", default=[], help="fault to inject (repeatable)"
    )
    r.add_argument("--oversample", type=int, default=2, help="magnetisation sampling factor")
    r.add_argument(
        "--layout",
        choices=LAYOUTS,
        default="line-files",
        help="how the lines are written: one HDF5 file per line (contract v1), one HDF5 file "
        "per scan that grows a row per line (SWMR), or per-line .npz files with a scan.json "
        "sidecar (the daemon's readers line-file, growing-file, plain-arrays)",
    )
    r.add_argument("--out", type=Path, default=Path("demo_out"), help="watched output folder")
    r.add_argument(
        "--truth", type=Path, default=Path("demo_truth"), help="ground-truth folder (not watched)"
    )
    return p


def config_from_args(args: argparse.Namespace) -> DemoConfig:
    """Build the :class:`DemoConfig` (SI units) from parsed options.

    Raises
    ------
    ValueError
        An option value is out of range; the message names the option's field.
    """
    scene = make_scene(args.scene or PRESETS[args.signal].scene, **dict(args.scene_param))
    theta = math.radians(args.nv_theta_deg)
    phi = math.radians(args.nv_phi_deg)
    if args.bias_mt is not None:
        bias: tuple[float, float, float] | None = tuple(b * 1e-3 for b in args.bias_mt)  # type: ignore[assignment]
    elif args.bias_along_nv_mt is not None:
        u = (math.sin(theta) * math.cos(phi), math.sin(theta) * math.sin(phi), math.cos(theta))
        bias = tuple(args.bias_along_nv_mt * 1e-3 * c for c in u)  # type: ignore[assignment]
    else:
        bias = (0.0, 0.0, 0.0) if PRESETS[args.signal].bias_along_nv_t == 0.0 else None
    preset = PRESETS[args.signal]
    hyperfine = preset.hyperfine if args.hyperfine is None else args.hyperfine
    tip = TipModel(
        standoff_m=args.standoff_nm * 1e-9,
        nv_theta_rad=theta,
        nv_phi_rad=phi,
        count_rate_cps=preset.count_rate_cps if args.count_rate is None else args.count_rate,
        contrast=preset.contrast if args.contrast is None else args.contrast,
        fwhm_hz=preset.fwhm_hz if args.linewidth_mhz is None else args.linewidth_mhz * 1e6,
        dwell_s=preset.dwell_s if args.dwell_ms is None else args.dwell_ms * 1e-3,
        temperature_k=(
            args.temperature_k
            if args.temperature_k is not None
            else preset.temperature_k or TipModel.temperature_k
        ),
        strain_hz=args.strain_mhz * 1e6,
        bias_field_t=bias,
        pl_drift_per_hour=args.drift_per_hour,
        pl_wobble=args.wobble,
        pl_wobble_period_s=args.wobble_period_s,
        hyperfine=None if hyperfine in (None, "none") else hyperfine,
    )
    if args.freq_list_ghz is not None and args.freq_ghz is not None:
        raise ValueError("--freq-ghz and --freq-list-ghz: give one of them, not both")
    if args.freq_list_ghz is not None:
        freq_hz = args.freq_list_ghz
    elif args.freq_ghz is None:
        freq_hz = preset.freq_hz()
    else:
        start, stop, n = args.freq_ghz
        try:
            n_freq = int(n)
            start_hz, stop_hz = float(start) * 1e9, float(stop) * 1e9
        except ValueError:
            raise ValueError(
                f"--freq-ghz must be START STOP N (two numbers and an integer); "
                f"found {start} {stop} {n}"
            ) from None
        freq_hz = frequency_grid_hz(start_hz, stop_hz, n_freq)
    return DemoConfig(
        scene=scene,
        tip=tip,
        n_lines=args.lines,
        n_pixels=args.pixels,
        pixel_m=args.pixel_nm * 1e-9,
        freq_hz=freq_hz,
        trace_retrace=args.trace_retrace,
        faults=tuple(args.fault),
        seed=args.seed,
        scan_id=args.scan_id,
        profile=args.profile,
        oversample=args.oversample,
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (2 for a bad option)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        config = config_from_args(args)
    except ValueError as exc:
        parser.error(str(exc))
    started = time.monotonic()
    try:
        record = run_scan(config, args.out, args.truth, pace_s=args.pace_s, layout=args.layout)
    except ValueError as exc:
        parser.error(str(exc))
    except KeyboardInterrupt:
        print(f"{config.scan_id}: interrupted; truth so far in {args.truth}", file=sys.stderr)
        return 130
    elapsed = time.monotonic() - started
    npz, json_path = truth_paths(args.truth, config.scan_id)
    faults = " ".join(fault_to_spec(f) for f in config.faults) or "none"
    print(
        f"{config.scan_id}: wrote {len(record.files)} files ({config.n_lines} lines x "
        f"{config.n_pixels} pixels x {config.freq_hz.size} frequencies, "
        f"{'+'.join(config.directions)}, scene {config.scene.name}) to "
        f"{Path(args.out) / config.scan_id} in {elapsed:.1f} s; truth {npz.name}, "
        f"{json_path.name} in {args.truth}; faults: {faults}"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
