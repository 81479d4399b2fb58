"""Scene families: scans drawn at random, for judging alert rules on unseen samples.

The alert rules are tuned on some seeds and reported on others, so each scan's sample,
tip, sweep and slow nuisances are drawn from a family, deterministically from an integer
seed: :func:`draw_scan` returns a :class:`FamilyScan` whose ``config`` is ready for
:func:`demo_stream.writer.run_scan` and whose ``summary`` says what was drawn.

One family per kind of sample (:data:`FAMILY_KINDS`), matching the daemon's sample-type
profiles. Every kind draws its geometry from the whole catalogue of scenes — stripe
domains at any angle (a fair share with walls within 3° of the fast axis, where a whole
scan line can run along one wall), labyrinths, disordered bubble lattices, dot arrays
with field-free gaps, current wires, film edges, weak antiferromagnet-like textures —
and scales its sheet moment (or current) to the field level of the kind.

Order of the draws
------------------
The geometry is drawn first and does not depend on the kind; the fault comes last, so a
seed gives the same sample, tip, sweep and nuisances with any fault or none (the fault
is then the only difference between two scans). The scene's own randomness and the
photon noise take seeds drawn at the start.

The ranges are ours (invented scenarios), chosen to span what each profile's comments
and the demo's signal presets describe: CW ODMR of a single shallow NV in a scanning tip,
linewidth 5–15 MHz, contrast 5–30 %, 10⁵–10⁶ counts/s (common practice, from memory).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from types import MappingProxyType
from typing import Any

import numpy as np

from demo_stream.faults import PIXEL_FAULTS, Fault, fault_to_spec
from demo_stream.scenes import SCENES, Scene
from demo_stream.tip import NV_100_THETA_RAD, TipModel, render_field_t, scan_axis_m
from demo_stream.writer import DemoConfig, frequency_grid_hz
from strayline.physics import nv_axis, to_nv_frame, transition_frequencies_hz, zfs_hz

__all__ = ["FAMILY_KINDS", "GEOMETRIES", "FamilyScan", "KindRanges", "draw_scan"]

Range = tuple[float, float]


@dataclass(frozen=True)
class KindRanges:
    """What one kind of sample draws from (SI units; every range inclusive).

    Attributes
    ----------
    description : str
        The kind of sample, in a sentence.
    profile : str or None
        The daemon's sample-type profile for it (None: the base config).
    peak_field_t : (float, float)
        Target stray field of the sample at the NV, T: the 99th percentile of |B| over the
        scan is drawn log-uniformly from this range.
    sheet_moment_a : (float, float)
        Bounds on the sheet moment density (or wire current, A) that reaching the target
        may take; the field falls short of the target when a bound is hit.
    bias_probability : float
        Chance that a bias field is applied.
    bias_t : (float, float)
        Bias magnitude along the NV axis when applied, T.
    temperature_k : (float, float)
        Tip temperature, K (sets D).
    standoff_m : (float, float)
        NV height above the sample, m.
    counts_per_sample : (float, float)
        Off-resonance counts per (pixel, frequency) sample, drawn log-uniformly.
    dwell_s : (float, float)
        Dwell per sample, s; the count rate is counts per sample / dwell.
    contrast : (float, float)
        Depth of each dip.
    fwhm_hz : (float, float)
        Linewidth, Hz.
    sweep_hz : (float, float)
        Outermost frequencies a sweep may reach, Hz.
    min_half_span_hz : float
        Smallest half-width of a sweep, Hz.
    zfs_drift_hz : float
        Largest drift of D over a scan, Hz (either sign).
    """

    description: str
    profile: str | None
    peak_field_t: Range
    sheet_moment_a: Range
    bias_probability: float
    bias_t: Range
    temperature_k: Range
    standoff_m: Range
    counts_per_sample: Range
    dwell_s: Range
    contrast: Range
    fwhm_hz: Range
    sweep_hz: Range
    min_half_span_hz: float
    zfs_drift_hz: float


#: The kinds of sample, one per alert-rule profile, with the ranges each draws from.
FAMILY_KINDS: Mapping[str, KindRanges] = MappingProxyType(
    {
        "default": KindRanges(
            description="ordinary ferromagnetic films at room temperature: mT fields",
            profile=None,
            peak_field_t=(0.3e-3, 4e-3),
            sheet_moment_a=(0.03e-3, 2e-3),
            bias_probability=0.6,
            bias_t=(1e-3, 5e-3),
            temperature_k=(293.0, 300.0),
            standoff_m=(35e-9, 110e-9),
            counts_per_sample=(300.0, 1500.0),
            dwell_s=(2e-3, 5e-3),
            contrast=(0.09, 0.2),
            fwhm_hz=(7e6, 14e6),
            sweep_hz=(2.45e9, 3.30e9),
            min_half_span_hz=40e6,
            zfs_drift_hz=0.6e6,
        ),
        # Fields up to ~10 mT with the bias; the profile fits centres in 2500-3250 MHz.
        "ferromagnet-multilayer": KindRanges(
            description="ferromagnetic multilayers with skyrmions and bubbles: strong fields",
            profile="ferromagnet-multilayer",
            peak_field_t=(2e-3, 8e-3),
            sheet_moment_a=(0.2e-3, 3e-3),
            bias_probability=1.0,
            bias_t=(1e-3, 5e-3),
            temperature_k=(293.0, 300.0),
            standoff_m=(35e-9, 110e-9),
            counts_per_sample=(300.0, 1500.0),
            dwell_s=(2e-3, 5e-3),
            contrast=(0.08, 0.2),
            fwhm_hz=(8e6, 20e6),
            sweep_hz=(2.48e9, 3.27e9),
            min_half_span_hz=60e6,
            zfs_drift_hz=0.6e6,
        ),
        # The profile fits centres within ±50 MHz of D, i.e. |B∥| < 1.78 mT: the bias is
        # kept to 1.0-1.5 mT (42 MHz) so the lines stay inside with the linewidth.
        "antiferromagnet-thin-film": KindRanges(
            description="antiferromagnetic thin films: µT textures on a small bias along the NV",
            profile="antiferromagnet-thin-film",
            peak_field_t=(2e-6, 40e-6),
            sheet_moment_a=(0.2e-6, 60e-6),
            bias_probability=1.0,
            bias_t=(1.0e-3, 1.5e-3),
            temperature_k=(293.0, 300.0),
            standoff_m=(35e-9, 110e-9),
            counts_per_sample=(400.0, 2000.0),
            dwell_s=(3e-3, 10e-3),
            contrast=(0.08, 0.2),
            fwhm_hz=(5e6, 12e6),
            sweep_hz=(2.78e9, 2.96e9),
            min_half_span_hz=30e6,
            zfs_drift_hz=0.6e6,
        ),
        # D(T) is flat below ~100 K (PHYSICS.md §1), so a night's temperature drift moves
        # D far less than at room temperature: 0.2 MHz at most here.
        "cryogenic-2d-magnet": KindRanges(
            description="2D van der Waals magnets at 4 K: weak fields, low counts",
            profile="cryogenic-2d-magnet",
            peak_field_t=(20e-6, 0.5e-3),
            sheet_moment_a=(2e-6, 0.5e-3),
            bias_probability=0.5,
            bias_t=(1e-3, 5e-3),
            temperature_k=(3.8, 6.0),
            standoff_m=(50e-9, 130e-9),
            counts_per_sample=(300.0, 1000.0),
            dwell_s=(5e-3, 15e-3),
            contrast=(0.08, 0.15),
            fwhm_hz=(3e6, 8e6),
            sweep_hz=(2.70e9, 3.06e9),
            min_half_span_hz=25e6,
            zfs_drift_hz=0.2e6,
        ),
    }
)

#: The sample geometries every kind draws from, with their chances.
GEOMETRIES: Mapping[str, float] = MappingProxyType(
    {
        "stripe_domains": 0.22,
        "labyrinth": 0.16,
        "bubble_lattice": 0.14,
        "dot_array": 0.14,
        "wire": 0.10,
        "film_edge": 0.12,
        "weak_domains": 0.12,
    }
)

_PIXEL_M: Range = (15e-9, 80e-9)  # pixel pitch, log-uniform
_UNIT_MOMENT_A = 1e-3  # the geometry is rendered once at this moment (or current)
_NEAR_AXIS_RAD = math.radians(3.0)  # "walls along the fast axis": within ±3°
_N_FREQ: tuple[int, int] = (61, 301)
_TIME_LIKE = ("fluorescence_lost", "contrast_collapsed", "tip_crash")


@dataclass(frozen=True, eq=False)
class FamilyScan:
    """One scan drawn from a family.

    Attributes
    ----------
    config : DemoConfig
        The scan, ready for :func:`demo_stream.writer.run_scan`.
    kind : str
        A key of :data:`FAMILY_KINDS`.
    seed : int
        The seed it was drawn with.
    summary : Mapping[str, Any]
        What was drawn, JSON-ready (``json.dumps(dict(summary))``): scene name and
        parameters, pixel pitch, tip values with the nuisances, sweep, peak field, scan
        duration, the fault's spec (or None).
    """

    config: DemoConfig
    kind: str
    seed: int
    summary: Mapping[str, Any]

    def describe(self) -> str:
        """One line saying what the scan is, for an evaluation's report."""
        s = self.summary
        tip = s["tip"]
        scene = s["scene"]
        angle = scene["params"].get("angle_rad")
        geometry = scene["name"] + ("" if angle is None else f" {math.degrees(angle):.1f}°")
        return (
            f"{self.kind} seed {self.seed}: {geometry}, peak {s['peak_field_t'] * 1e3:.3g} mT, "
            f"pixel {s['pixel_m'] * 1e9:.0f} nm, d {tip['standoff_m'] * 1e9:.0f} nm, "
            f"{tip['cut']} tip, bias {tip['bias_along_nv_t'] * 1e3:.2f} mT, "
            f"{s['sweep']['start_hz'] / 1e9:.4f}-{s['sweep']['stop_hz'] / 1e9:.4f} GHz "
            f"x {s['sweep']['n_freq']}, {tip['counts_per_sample']:.0f} counts, "
            f"C {tip['contrast']:.2f}, fault {s['fault']}"
        )


def _log_uniform(rng: np.random.Generator, bounds: Range) -> float:
    lo, hi = bounds
    return float(np.exp(rng.uniform(np.log(lo), np.log(hi))))


def _uniform(rng: np.random.Generator, bounds: Range) -> float:
    return float(rng.uniform(*bounds))


def _draw_geometry(
    rng: np.random.Generator, pixel_m: float, width_m: float, height_m: float, scene_seed: int
) -> tuple[str, dict[str, float], str]:
    """A geometry: factory name, its parameters but the moment, and the moment's key."""
    names = list(GEOMETRIES)
    weights = np.array([GEOMETRIES[n] for n in names])
    name = names[int(rng.choice(len(names), p=weights / weights.sum()))]
    nm = 1e-9

    def size(lo: float, hi: float) -> float:
        # At least 5 pixels per period, so the pattern is sampled, not aliased.
        low = max(lo, 5.0 * pixel_m)
        return _log_uniform(rng, (low, max(hi, 2.0 * low)))

    def angle_near_axis_or_any(any_rad: float) -> float:
        if rng.random() < 0.4:
            return float(rng.uniform(-_NEAR_AXIS_RAD, _NEAR_AXIS_RAD))
        return float(rng.uniform(0.0, any_rad))

    if name == "stripe_domains":
        period = size(150 * nm, 1.5e-6)
        params = {
            "period_m": period,
            "angle_rad": angle_near_axis_or_any(np.pi),
            "wall_width_m": _uniform(rng, (5 * nm, 30 * nm)),
            "duty": _uniform(rng, (0.3, 0.7)),
            "offset_m": _uniform(rng, (0.0, period)),
        }
    elif name == "labyrinth":
        params = {
            "period_m": size(200 * nm, 1.2e-6),
            "wall_width_m": _uniform(rng, (5 * nm, 30 * nm)),
            "seed": scene_seed,
        }
    elif name == "weak_domains":
        params = {
            "period_m": size(600 * nm, 2e-6),
            "wall_width_m": _uniform(rng, (20 * nm, 80 * nm)),
            "seed": scene_seed,
        }
    elif name == "bubble_lattice":
        spacing = size(300 * nm, 1e-6)
        params = {
            "spacing_m": spacing,
            "radius_m": _uniform(rng, (0.15, 0.32)) * spacing,
            "wall_width_m": _uniform(rng, (5 * nm, 25 * nm)),
            "disorder_m": _uniform(rng, (0.0, 0.2)) * spacing if rng.random() < 0.7 else 0.0,
            "radius_spread": _uniform(rng, (0.0, 0.3)) if rng.random() < 0.7 else 0.0,
            "seed": scene_seed,
        }
    elif name == "dot_array":
        pitch = size(250 * nm, 1e-6)
        params = {
            "pitch_m": pitch,
            "radius_m": _uniform(rng, (0.15, 0.4)) * pitch,
            "angle_rad": _uniform(rng, (0.0, np.pi / 2.0)),
            "wall_width_m": _uniform(rng, (3 * nm, 15 * nm)),
            "jitter_m": _uniform(rng, (0.0, 0.1)) * pitch if rng.random() < 0.5 else 0.0,
            "seed": scene_seed,
        }
    elif name == "wire":
        params = {"x0_m": _uniform(rng, (-0.4, 0.4)) * width_m}
    else:  # film_edge: the film on either side of an edge in any direction
        # Along the fast axis, the film lies on one side or the other (angle 0 or π).
        angle = angle_near_axis_or_any(2.0 * np.pi) + np.pi * float(rng.integers(2))
        params = {
            "angle_rad": float(np.mod(angle, 2.0 * np.pi)),
            "offset_m": _uniform(rng, (-0.4, 0.4)) * min(width_m, height_m),
            "wall_width_m": _uniform(rng, (3 * nm, 20 * nm)),
        }
    moment_key = "current_a" if name == "wire" else "sheet_moment_a"
    return name, params, moment_key


def _sweep(
    rng: np.random.Generator,
    ranges: KindRanges,
    *,
    f_pairs_hz: np.ndarray,
    zfs_span_hz: Range,
    zfs_start_hz: float,
    fwhm_hz: float,
) -> tuple[float, float, int]:
    """Start, stop (Hz) and points of a sweep around the resonances ``f_pairs_hz`` (n, 2).

    Centred on the span of the resonances (their D moved to either end of its drift);
    the half-width is the span's half plus 1.5-4 linewidths, widened by 0-50 %. One scan
    in seven is set tight instead: from the 0.2-1.5 % quantiles of the resonances, plus
    0-1 linewidth (an operator who sweeps only what the bulk of the image needs, so a
    few dips sit at or past the ends). Kept within the kind's outermost frequencies;
    2.5-5 points per linewidth, 61-301 points.
    """
    tight = rng.random() < 1.0 / 7.0
    q = _uniform(rng, (0.002, 0.015)) if tight else 0.0
    lo = float(np.quantile(f_pairs_hz[:, 0], q)) + zfs_span_hz[0] - zfs_start_hz
    hi = float(np.quantile(f_pairs_hz[:, 1], 1.0 - q)) + zfs_span_hz[1] - zfs_start_hz
    centre = 0.5 * (lo + hi)
    margin = _uniform(rng, (0.0, 1.0) if tight else (1.5, 4.0)) * fwhm_hz
    widen = 1.0 if tight else _uniform(rng, (1.0, 1.5))
    half = max((0.5 * (hi - lo) + margin) * widen, ranges.min_half_span_hz)
    start = max(centre - half, ranges.sweep_hz[0])
    stop = min(centre + half, ranges.sweep_hz[1])
    step = fwhm_hz / _uniform(rng, (2.5, 5.0))
    n_freq = int(np.clip(round((stop - start) / step) + 1, *_N_FREQ))
    return start, stop, n_freq


def _draw_fault(rng: np.random.Generator, kind: str, n_lines: int, n_pixels: int) -> Fault:
    """A fault of ``kind`` after the first quarter and before the last 5 lines.

    Sizes are rounded (0.1 nm, 1 kHz, 0.001) so that its spec stays short.
    """
    first, last = n_lines // 4, n_lines - 6
    if last < first:
        raise ValueError(
            f"draw_scan: n_lines must be >= 8 to place a fault after the first quarter and "
            f"before the last 5 lines; found {n_lines}"
        )
    line = int(rng.integers(first, last + 1))
    pixel = int(rng.integers(0, n_pixels))
    end: int | None
    if kind in _TIME_LIKE:
        end = None if rng.random() < 0.5 else line + int(rng.integers(1, 5))
        if kind == "tip_crash":
            params = {
                "standoff_step_m": round(_uniform(rng, (5e-9, 50e-9)), 10),
                "pl_factor": round(_uniform(rng, (0.5, 0.95)), 3),
            }
        elif kind == "fluorescence_lost":
            params = {"pl_factor": round(_uniform(rng, (0.02, 0.4)), 3)}
        else:
            params = {"contrast_factor": round(_uniform(rng, (0.0, 0.3)), 3)}
    else:  # sample_touched
        width = min(int(rng.integers(3, 16)), n_pixels)
        pixel = int(rng.integers(0, n_pixels - width + 1))
        end = line + int(rng.integers(0, 3))
        params = {
            "zfs_shift_hz": round(_uniform(rng, (1e6, 8e6)), -3),
            "width_pixels": float(width),
            "pl_factor": round(_uniform(rng, (0.8, 1.0)), 3),
        }
    return Fault(kind=kind, start_line=line, start_pixel=pixel, end_line=end, params=params)


def draw_scan(
    seed: int,
    kind: str,
    *,
    n_lines: int = 48,
    n_pixels: int = 64,
    fault: str | None = None,
    scan_id: str = "eval",
    profile: str | None = None,
) -> FamilyScan:
    """Draw one scan of the family ``kind``, deterministically from ``seed``.

    Parameters
    ----------
    seed : int
        Any integer >= 0; the same seed and arguments give the same scan, counts included.
    kind : str
        A key of :data:`FAMILY_KINDS`.
    n_lines, n_pixels : int
        Scan size (slow, fast axis).
    fault : str or None
        None for a clean scan, or one of ``fluorescence_lost``, ``contrast_collapsed``,
        ``tip_crash``, ``sample_touched``: placed at a random line after the first
        quarter and before the last 5 lines, at a random pixel, with its size drawn over
        the physical range (tip crash: stand-off step 5-50 nm, PL factor 0.5-0.95; lost
        fluorescence: PL factor 0.02-0.4; collapsed contrast: contrast factor 0-0.3;
        touch: D shift 1-8 MHz, 3-15 pixels, 1-3 lines, PL factor 0.8-1). Half of the
        time-like faults persist to the end, half end 1-4 lines after they start.
    scan_id : str
        Scan identifier (folder name).
    profile : str or None
        Profile name written into the files; None takes the kind's own profile.

    Returns
    -------
    FamilyScan

    Raises
    ------
    ValueError
        Unknown kind or fault, a negative seed, or a scan too short to place a fault in.

    Notes
    -----
    The sweep is laid out from the exact resonances of the drawn sample: the geometry is
    rendered once at a unit moment, scaled to the drawn peak field, projected on the NV
    axis with the bias and passed through the spin Hamiltonian
    (:func:`strayline.physics.transition_frequencies_hz`, Doherty et al., Phys. Rep. 528,
    1 (2013)); see :func:`_sweep` for the margins.
    """
    if kind not in FAMILY_KINDS:
        raise ValueError(
            f"draw_scan: kind must be one of {', '.join(FAMILY_KINDS)}; found {kind!r}"
        )
    if fault is not None and fault not in PIXEL_FAULTS:
        raise ValueError(
            f"draw_scan: fault must be None or one of {', '.join(sorted(PIXEL_FAULTS))}; "
            f"found {fault!r}"
        )
    if not (isinstance(seed, int | np.integer) and seed >= 0):
        raise ValueError(f"draw_scan: seed must be an integer >= 0; found {seed!r}")
    for key, value in (("n_lines", n_lines), ("n_pixels", n_pixels)):
        if not (isinstance(value, int) and value >= 2):
            raise ValueError(f"draw_scan: {key} must be an integer >= 2; found {value!r}")
    ranges = FAMILY_KINDS[kind]
    rng = np.random.default_rng(int(seed))
    scene_seed = int(rng.integers(2**31))
    noise_seed = int(rng.integers(2**31))

    # -- geometry (the same for every kind) ---------------------------------------------
    pixel_m = _log_uniform(rng, _PIXEL_M)
    name, geometry, moment_key = _draw_geometry(
        rng, pixel_m, n_pixels * pixel_m, n_lines * pixel_m, scene_seed
    )
    # Domain patterns look the same either way up; a wire's current and a film's
    # magnetisation take either sign.
    signed = name in ("wire", "film_edge")
    moment_sign = -1.0 if signed and rng.random() < 0.5 else 1.0

    # -- tip and signal -------------------------------------------------------------------
    if rng.random() < 0.75:
        cut = "(100)"
        theta = NV_100_THETA_RAD
        phi = float(np.deg2rad(45.0 + 90.0 * rng.integers(4)))
    else:
        cut = "(111)"
        theta, phi = 0.0, 0.0
    axis = nv_axis(theta, phi)
    standoff_m = _uniform(rng, ranges.standoff_m)
    bias_t = _uniform(rng, ranges.bias_t) if rng.random() < ranges.bias_probability else 0.0
    temperature_k = _uniform(rng, ranges.temperature_k)
    counts_per_sample = _log_uniform(rng, ranges.counts_per_sample)
    dwell_s = _uniform(rng, ranges.dwell_s)
    contrast = _uniform(rng, ranges.contrast)
    fwhm_hz = _uniform(rng, ranges.fwhm_hz)

    # -- the sample's strength: the geometry at a unit moment, scaled to the target --------
    x_m = scan_axis_m(n_pixels, pixel_m)
    y_m = scan_axis_m(n_lines, pixel_m)
    unit = SCENES[name](**{**geometry, moment_key: _UNIT_MOMENT_A})
    b_unit = render_field_t(unit, x_m, y_m, standoff_m, oversample=2)
    peak_unit = float(np.quantile(np.linalg.norm(b_unit, axis=0), 0.99))
    target_t = _log_uniform(rng, ranges.peak_field_t)
    wanted = _UNIT_MOMENT_A * target_t / peak_unit if peak_unit > 0 else np.inf
    moment = float(np.clip(wanted, *ranges.sheet_moment_a))
    scene: Scene = SCENES[name](**{**geometry, moment_key: moment_sign * moment})
    b_scene = b_unit * (moment_sign * moment / _UNIT_MOMENT_A)
    peak_t = peak_unit * moment / _UNIT_MOMENT_A

    # -- slow nuisances, in units of the whole scan ---------------------------------------
    bleach = _uniform(rng, (0.0, 0.25))
    wobble = _uniform(rng, (0.0, 0.04))
    wobble_periods = _log_uniform(rng, (1.0, 10.0))
    zfs_drift_hz = _uniform(rng, (-ranges.zfs_drift_hz, ranges.zfs_drift_hz))
    has_step = rng.random() < 0.3
    step_fraction = float(rng.choice([-1.0, 1.0])) * _uniform(rng, (0.02, 0.08))
    step_at = _uniform(rng, (0.1, 0.9))
    if not has_step:
        step_fraction, step_at = 0.0, 0.0

    # -- the sweep around the resonances ---------------------------------------------------
    bias = bias_t * axis
    d0 = float(zfs_hz(temperature_k))
    b_pixels = (b_scene + bias[:, None, None]).reshape(3, -1).T
    f_pairs = transition_frequencies_hz(to_nv_frame(b_pixels, theta, phi), d0, 0.0)
    zfs_span = (d0 + min(0.0, zfs_drift_hz), d0 + max(0.0, zfs_drift_hz))
    start_hz, stop_hz, n_freq = _sweep(
        rng, ranges, f_pairs_hz=f_pairs, zfs_span_hz=zfs_span, zfs_start_hz=d0, fwhm_hz=fwhm_hz
    )
    duration_s = n_lines * n_pixels * n_freq * dwell_s
    hours = duration_s / 3600.0

    tip = TipModel(
        standoff_m=standoff_m,
        nv_theta_rad=theta,
        nv_phi_rad=phi,
        count_rate_cps=counts_per_sample / dwell_s,
        contrast=contrast,
        fwhm_hz=fwhm_hz,
        dwell_s=dwell_s,
        temperature_k=temperature_k,
        bias_field_t=(float(bias[0]), float(bias[1]), float(bias[2])),
        pl_drift_per_hour=-bleach / hours,
        pl_wobble=wobble,
        pl_wobble_period_s=duration_s / wobble_periods,
        pl_step_fraction=step_fraction,
        pl_step_at_s=step_at * duration_s,
        zfs_drift_hz_per_hour=zfs_drift_hz / hours,
    )
    faults = () if fault is None else (_draw_fault(rng, fault, n_lines, n_pixels),)
    config = DemoConfig(
        scene=scene,
        tip=tip,
        n_lines=n_lines,
        n_pixels=n_pixels,
        pixel_m=pixel_m,
        freq_hz=frequency_grid_hz(start_hz, stop_hz, n_freq),
        faults=faults,
        seed=noise_seed,
        scan_id=scan_id,
        profile=ranges.profile if profile is None else profile,
        oversample=2,
    )
    tip_values = asdict(tip)
    tip_values.update(
        bias_field_t=list(tip.bias_field_t or ()),
        cut=cut,
        bias_along_nv_t=bias_t,
        counts_per_sample=counts_per_sample,
        zfs_hz=d0,
    )
    summary = {
        "kind": kind,
        "seed": int(seed),
        "scene": {"name": scene.name, "params": dict(scene.params)},
        "n_lines": n_lines,
        "n_pixels": n_pixels,
        "pixel_m": pixel_m,
        "peak_field_t": peak_t,
        "target_peak_field_t": target_t,
        "tip": tip_values,
        "sweep": {"start_hz": start_hz, "stop_hz": stop_hz, "n_freq": n_freq},
        "scan_duration_s": duration_s,
        "nuisances": {
            "pl_bleach_fraction": bleach,
            "pl_wobble": wobble,
            "pl_wobble_periods": wobble_periods,
            "zfs_drift_hz": zfs_drift_hz,
            "pl_step_fraction": step_fraction,
            "pl_step_at_fraction": step_at,
        },
        "noise_seed": noise_seed,
        "profile": config.profile,
        "fault": None if not faults else fault_to_spec(faults[0]),
    }
    return FamilyScan(config=config, kind=kind, seed=int(seed), summary=MappingProxyType(summary))
