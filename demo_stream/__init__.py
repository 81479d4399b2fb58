"""demo_stream: a synthetic scanning-NV instrument that writes scan-line files.

It renders an invented sample (:mod:`demo_stream.scenes`) through an NV tip model
(:mod:`demo_stream.tip`), injects faults (:mod:`demo_stream.faults`), writes one
scan-line file per completed line at instrument pace and the exact ground truth
(:mod:`demo_stream.writer`, :mod:`demo_stream.truth`). Command line:
``python -m demo_stream --help``.
"""

from demo_stream.faults import FAULT_KINDS, Fault, fault_to_spec, parse_fault
from demo_stream.presets import PRESETS, SignalPreset
from demo_stream.scenes import (
    SCENES,
    Scene,
    bubble_lattice,
    calibration_stripe,
    labyrinth,
    make_scene,
    weak_domains,
    wire,
)
from demo_stream.tip import ScanRenderer, TipModel, TraceTruth, render_field_t, scan_axis_m
from demo_stream.truth import TruthRecord, WrittenFile, load_truth, truth_paths
from demo_stream.writer import DemoConfig, config_to_dict, frequency_grid_hz, run_scan

__all__ = [
    "FAULT_KINDS",
    "PRESETS",
    "SCENES",
    "DemoConfig",
    "Fault",
    "ScanRenderer",
    "Scene",
    "SignalPreset",
    "TipModel",
    "TraceTruth",
    "TruthRecord",
    "WrittenFile",
    "bubble_lattice",
    "calibration_stripe",
    "config_to_dict",
    "fault_to_spec",
    "frequency_grid_hz",
    "labyrinth",
    "load_truth",
    "make_scene",
    "parse_fault",
    "render_field_t",
    "run_scan",
    "scan_axis_m",
    "truth_paths",
    "weak_domains",
    "wire",
]
