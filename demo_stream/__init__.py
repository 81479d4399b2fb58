"""demo_stream: a synthetic scanning-NV instrument that writes scan-line files.

It renders an invented sample (:mod:`demo_stream.scenes`) through an NV tip model
(:mod:`demo_stream.tip`), injects faults (:mod:`demo_stream.faults`), writes one
scan-line file per completed line at instrument pace and the exact ground truth
(:mod:`demo_stream.writer`, :mod:`demo_stream.truth`). :mod:`demo_stream.family` draws
whole scans (sample, tip, sweep, slow nuisances, fault) at random from a seed;
:mod:`demo_stream.calibration` draws calibration scans of a known film edge. Command
line: ``python -m demo_stream --help``.
"""

from demo_stream.calibration import calibration_scan
from demo_stream.family import FAMILY_KINDS, FamilyScan, draw_scan
from demo_stream.faults import FAULT_KINDS, Fault, fault_to_spec, parse_fault
from demo_stream.presets import PRESETS, SignalPreset
from demo_stream.scenes import (
    SCENES,
    Scene,
    bubble_lattice,
    calibration_stripe,
    dot_array,
    film_edge,
    labyrinth,
    make_scene,
    stripe_domains,
    weak_domains,
    wire,
)
from demo_stream.tip import ScanRenderer, TipModel, TraceTruth, render_field_t, scan_axis_m
from demo_stream.truth import TruthRecord, WrittenFile, load_truth, truth_paths
from demo_stream.writer import DemoConfig, config_to_dict, frequency_grid_hz, run_scan

__all__ = [
    "FAMILY_KINDS",
    "FAULT_KINDS",
    "PRESETS",
    "SCENES",
    "DemoConfig",
    "FamilyScan",
    "Fault",
    "ScanRenderer",
    "Scene",
    "SignalPreset",
    "TipModel",
    "TraceTruth",
    "TruthRecord",
    "WrittenFile",
    "bubble_lattice",
    "calibration_scan",
    "calibration_stripe",
    "config_to_dict",
    "dot_array",
    "draw_scan",
    "fault_to_spec",
    "film_edge",
    "frequency_grid_hz",
    "labyrinth",
    "load_truth",
    "make_scene",
    "parse_fault",
    "render_field_t",
    "run_scan",
    "scan_axis_m",
    "stripe_domains",
    "truth_paths",
    "weak_domains",
    "wire",
]
