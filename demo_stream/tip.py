"""The tip: an NV centre at a stand-off above the scene, and the spectra it records.

For every pixel the model takes the field at the NV (scene stray field at the stand-off
plus a bias field), the exact ODMR transition frequencies from the spin Hamiltonian, and
a count rate, contrast and linewidth, and returns the expected photon counts of a CW
ODMR sweep; :meth:`ScanRenderer.render_trace` adds Poisson noise.

Geometry and order
------------------
The scan grid is centred on the scene origin: column ``i`` of a line of ``n`` pixels sits
at ``x = (i - (n - 1) / 2) * pixel_m`` and line ``k`` at ``y = (k - (n_lines - 1) / 2) *
pixel_m``. A line is acquired forward (increasing x) and, with trace/retrace, then
backward (decreasing x) at the same y. Every per-pixel array here is in **column order**
(increasing x); the writer stores a backward trace in acquisition order.

Time
----
The slow nuisances run on the instrument clock: every (pixel, frequency) sample takes
``dwell_s``, so a pixel takes ``n_freq * dwell_s`` and the clock counts pixels in
acquisition order from the start of the scan (the writer's pace does not enter). Each
pixel takes the value at the middle of its sweep of:

- the PL drift: linear (bleaching when negative) plus a sinusoidal focus wobble;
- a step of the laser power, a relative PL change from a chosen time on;
- a linear drift of the zero-field splitting D, as a slow temperature drift gives
  (dD/dT = −74.2 kHz/K near room temperature [4]_).

Not modelled: the drop of PL and contrast in a large off-axis field (Tetienne et al.,
New J. Phys. 14, 103033 (2012)), photon shot noise beyond Poisson, laser-power noise.

References
----------
.. [1] M. W. Doherty et al., "The nitrogen-vacancy colour centre in diamond",
   Phys. Rep. 528, 1 (2013) — the spin Hamiltonian behind the transition frequencies.
.. [2] R. Beardsley, "Reconstruction of the magnetization in a thin film by a
   combination of Lorentz microscopy and external field measurements",
   IEEE Trans. Magn. 25, 671 (1989) — stray field of a sheet in Fourier space.
.. [3] E. A. Lima and B. P. Weiss, "Obtaining vector magnetic field maps from
   single-component measurements of geological samples", J. Geophys. Res. 114,
   B06102 (2009) — the full vector field from one component.
.. [4] V. M. Acosta et al., "Temperature dependence of the nitrogen-vacancy magnetic
   resonance in diamond", Phys. Rev. Lett. 104, 070801 (2010).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from demo_stream.faults import PIXEL_FAULTS, Fault, fault_mask
from demo_stream.scenes import Scene
from strayline.physics import (
    lorentzian_dips,
    nv_axis,
    stray_field_t,
    to_nv_frame,
    transition_frequencies_hz,
    zfs_hz,
)

__all__ = [
    "NV_100_PHI_RAD",
    "NV_100_THETA_RAD",
    "ScanRenderer",
    "TipModel",
    "TraceTruth",
    "pl_drift_factor",
    "pl_step_factor",
    "render_field_t",
    "scan_axis_m",
]

#: Polar angle of an NV axis in a (100) tip: arccos(1/√3) = 54.7356° [num] (PHYSICS.md §6).
NV_100_THETA_RAD: float = float(np.arccos(1.0 / np.sqrt(3.0)))
#: Azimuth of the (100) tip's NV axis along ⟨110⟩, 45°; in practice a calibration input.
NV_100_PHI_RAD: float = float(np.pi / 4.0)
_DEFAULT_BIAS_ALONG_NV_T = 3e-3


@dataclass(frozen=True)
class TipModel:
    """The NV tip and its optics.

    Attributes
    ----------
    standoff_m : float
        NV height above the sample surface, m.
    nv_theta_rad, nv_phi_rad : float
        NV axis orientation in the scan frame, rad (default: a (100) tip).
    count_rate_cps : float
        PL count rate off resonance, counts/s.
    contrast : float
        Fractional depth of each ODMR dip (0.15 = 15 %).
    fwhm_hz : float
        Linewidth (FWHM) of each dip, Hz.
    dwell_s : float
        Integration time per (pixel, frequency) sample, s.
    temperature_k : float
        Tip temperature, K; sets D through :func:`strayline.physics.constants.zfs_hz`.
    strain_hz : float
        Transverse splitting E, Hz.
    bias_field_t : tuple of 3 floats, or None
        Uniform bias field (Bx, By, Bz) in the scan frame, T; None means 3 mT along the
        NV axis (separates the two lines and fixes the sign of the projection).
    pl_drift_per_hour : float
        Linear relative PL drift, per hour of instrument time (0.03 = +3 %/h).
    pl_wobble : float
        Relative amplitude of a sinusoidal PL drift.
    pl_wobble_period_s : float
        Period of the sinusoidal drift, s.
    hyperfine : {None, "14N", "15N"}
        Resolved nitrogen hyperfine structure of each dip (see
        :func:`strayline.physics.spectrum.hyperfine_pattern`).
    pl_step_fraction : float
        Relative change of the PL at ``pl_step_at_s`` (a laser-power step; -0.08 = 8 %
        dimmer from then on); greater than -1.
    pl_step_at_s : float
        Instrument time of the step, s.
    zfs_drift_hz_per_hour : float
        Linear drift of D, Hz per hour of instrument time (a temperature drift of
        +1 K/h gives about -74 kHz/h near room temperature).
    tip_id : str or None
        The tip's name, written into every line file (``tip_id``); None writes none.
    """

    standoff_m: float = 60e-9
    nv_theta_rad: float = NV_100_THETA_RAD
    nv_phi_rad: float = NV_100_PHI_RAD
    count_rate_cps: float = 2e5
    contrast: float = 0.15
    fwhm_hz: float = 10e6
    dwell_s: float = 3e-3
    temperature_k: float = 295.0
    strain_hz: float = 0.0
    bias_field_t: tuple[float, float, float] | None = None
    pl_drift_per_hour: float = 0.03
    pl_wobble: float = 0.0
    pl_wobble_period_s: float = 1800.0
    hyperfine: str | None = None
    pl_step_fraction: float = 0.0
    pl_step_at_s: float = 0.0
    zfs_drift_hz_per_hour: float = 0.0
    tip_id: str | None = None

    def __post_init__(self) -> None:
        positive = {
            "standoff_m": self.standoff_m,
            "count_rate_cps": self.count_rate_cps,
            "fwhm_hz": self.fwhm_hz,
            "dwell_s": self.dwell_s,
            "temperature_k": self.temperature_k,
            "pl_wobble_period_s": self.pl_wobble_period_s,
        }
        for key, value in positive.items():
            if not (np.isfinite(value) and value > 0):
                raise ValueError(f"tip: {key} must be a finite number > 0; found {value}")
        # Two overlapping dips add their depths; at most 0.5 each keeps counts >= 0.
        if not 0.0 <= self.contrast <= 0.5:
            raise ValueError(f"tip: contrast must be in [0, 0.5]; found {self.contrast}")
        if self.hyperfine not in (None, "14N", "15N"):
            raise ValueError(
                f"tip: hyperfine must be None, '14N' or '15N'; found {self.hyperfine!r}"
            )
        if not 0.0 <= self.pl_wobble < 1.0:
            raise ValueError(f"tip: pl_wobble must be in [0, 1); found {self.pl_wobble}")
        for key in ("pl_drift_per_hour", "zfs_drift_hz_per_hour"):
            value = getattr(self, key)
            if not np.isfinite(value):
                raise ValueError(f"tip: {key} must be finite; found {value}")
        if not (np.isfinite(self.pl_step_fraction) and self.pl_step_fraction > -1.0):
            raise ValueError(
                f"tip: pl_step_fraction must be a finite number > -1; found {self.pl_step_fraction}"
            )
        if not (np.isfinite(self.pl_step_at_s) and self.pl_step_at_s >= 0.0):
            raise ValueError(
                f"tip: pl_step_at_s must be a finite number >= 0; found {self.pl_step_at_s}"
            )
        if self.bias_field_t is None:
            u = nv_axis(self.nv_theta_rad, self.nv_phi_rad)
            bias = tuple(float(c) for c in _DEFAULT_BIAS_ALONG_NV_T * u)
        else:
            bias = tuple(float(c) for c in self.bias_field_t)
            if len(bias) != 3 or not all(np.isfinite(bias)):
                raise ValueError(
                    f"tip: bias_field_t must be 3 finite numbers (Bx, By, Bz) in T; "
                    f"found {self.bias_field_t}"
                )
        object.__setattr__(self, "bias_field_t", bias)

    @property
    def zfs_hz(self) -> float:
        """Zero-field splitting at :attr:`temperature_k`, Hz (at the start of the scan)."""
        return float(zfs_hz(self.temperature_k))


def scan_axis_m(n: int, pixel_m: float) -> np.ndarray:
    """Centred pixel positions ``(i - (n - 1) / 2) * pixel_m``, shape (n,), m."""
    return (np.arange(n) - (n - 1) / 2.0) * pixel_m


def render_field_t(
    scene: Scene,
    x_m: np.ndarray,
    y_m: np.ndarray,
    standoff_m: float,
    *,
    oversample: int = 2,
    margin_standoffs: float = 10.0,
) -> np.ndarray:
    """Field of ``scene`` at height ``standoff_m`` on a regular scan grid.

    Parameters
    ----------
    scene : Scene
        Sheet magnetisation or analytic field.
    x_m : ndarray, shape (nx,)
        Fast-axis positions, m, evenly spaced.
    y_m : ndarray, shape (ny,)
        Slow-axis positions, m, same spacing as ``x_m``.
    standoff_m : float
        Height above the sample surface, m.
    oversample : int
        The magnetisation is sampled ``oversample`` times finer than the scan grid
        (reducing aliasing of domain walls), propagated, and read back on the scan grid.
    margin_standoffs : float
        Margin of sample evaluated around the scan area, in stand-offs.

    Returns
    -------
    ndarray, shape (3, ny, nx)
        (Bx, By, Bz), T.

    Notes
    -----
    A sheet magnetisation is propagated in Fourier space by
    :func:`strayline.physics.strayfield.stray_field_t` (Beardsley 1989; Lima & Weiss
    2009). The scene extends beyond the scan, so it is evaluated on the scan area plus a
    margin of ``margin_standoffs`` stand-offs on every side and propagated as a periodic
    map (``pad=0``): the seams of the periodic wrap lie in the margin, at least that far
    from any scan pixel, and the sample does not end at the scan's border (zero padding
    would put an artificial film edge there).
    """
    x = np.asarray(x_m, dtype=float)
    y = np.asarray(y_m, dtype=float)
    if scene.field_t is not None:
        return np.asarray(scene.field_t(x, y, standoff_m), dtype=float)
    assert scene.sheet_moment_a is not None
    pitch = float(x[1] - x[0]) if x.size > 1 else float(y[1] - y[0]) if y.size > 1 else 1e-8
    fine = pitch / oversample
    margin = int(np.ceil(margin_standoffs * standoff_m / fine))
    # Fine grid from the first scan point (minus the margin): every oversample-th fine
    # point after the margin is a scan point, so reading back is plain slicing.
    xf = x[0] + fine * np.arange(-margin, x.size * oversample + margin)
    yf = y[0] + fine * np.arange(-margin, y.size * oversample + margin)
    m_z_a = scene.sheet_moment_a(xf, yf)
    b = stray_field_t(m_z_a, pixel_m=fine, standoff_m=standoff_m, pad=0)
    inner = b[:, margin : margin + y.size * oversample, margin : margin + x.size * oversample]
    return np.ascontiguousarray(inner[:, ::oversample, ::oversample])


def pl_drift_factor(
    t_s: np.ndarray, per_hour: float, wobble: float, wobble_period_s: float
) -> np.ndarray:
    """Relative PL ``1 + per_hour t / 3600 + wobble sin(2π t / period)`` [cp].

    Parameters
    ----------
    t_s : ndarray, any shape
        Instrument time since the start of the scan, s.

    Returns
    -------
    ndarray, same shape as ``t_s``
        Factor on the count rate (floored at 0).
    """
    t = np.asarray(t_s, dtype=float)
    factor = 1.0 + per_hour * t / 3600.0 + wobble * np.sin(2.0 * np.pi * t / wobble_period_s)
    return np.maximum(factor, 0.0)


def pl_step_factor(t_s: np.ndarray, fraction: float, at_s: float) -> np.ndarray:
    """Relative PL ``1 + fraction`` from ``at_s`` on, 1 before (a laser-power step) [cp].

    Parameters
    ----------
    t_s : ndarray, any shape
        Instrument time since the start of the scan, s.
    fraction : float
        Relative PL change, > -1.
    at_s : float
        Time of the step, s.

    Returns
    -------
    ndarray, same shape as ``t_s``
        Factor on the count rate.
    """
    t = np.asarray(t_s, dtype=float)
    return np.where(t >= at_s, 1.0 + fraction, 1.0)


@dataclass(frozen=True, eq=False)
class TraceTruth:
    """The true state of every pixel of one trace, column order (increasing x).

    Attributes
    ----------
    field_xyz_t : ndarray, shape (n_pixels, 3)
        Total field at the NV (scene + bias) in the scan frame, T.
    field_nv_t : ndarray, shape (n_pixels,)
        Its projection on the NV axis, T.
    field_abs_t : ndarray, shape (n_pixels,)
        Its magnitude, T.
    f_lo_hz, f_hi_hz : ndarray, shape (n_pixels,)
        Exact ODMR transition frequencies, Hz.
    zfs_hz : ndarray, shape (n_pixels,)
        Zero-field splitting used (D(T), its drift and any contact-strain shift), Hz.
    standoff_m : ndarray, shape (n_pixels,)
        NV height, m.
    pl_rate_cps : ndarray, shape (n_pixels,)
        Off-resonance count rate, counts/s (drift, wobble, step and faults included).
    contrast : ndarray, shape (n_pixels,)
        Depth of each dip.
    time_s : ndarray, shape (n_pixels,)
        Instrument time at the middle of the pixel's sweep, s.
    """

    field_xyz_t: np.ndarray
    field_nv_t: np.ndarray
    field_abs_t: np.ndarray
    f_lo_hz: np.ndarray
    f_hi_hz: np.ndarray
    zfs_hz: np.ndarray
    standoff_m: np.ndarray
    pl_rate_cps: np.ndarray
    contrast: np.ndarray
    time_s: np.ndarray


@dataclass(frozen=True, eq=False)
class _FieldCache:
    """Scene field maps (3, n_lines, n_pixels) by stand-off, rendered on first use."""

    scene: Scene
    x_m: np.ndarray
    y_m: np.ndarray
    oversample: int
    maps: dict[float, np.ndarray] = field(default_factory=dict)

    def get(self, standoff_m: float) -> np.ndarray:
        key = round(standoff_m, 15)
        if key not in self.maps:
            self.maps[key] = render_field_t(
                self.scene, self.x_m, self.y_m, standoff_m, oversample=self.oversample
            )
        return self.maps[key]


class ScanRenderer:
    """Renders every trace of a scan: expected counts, noisy counts, and the truth.

    All options are settled here; :meth:`render_trace` only computes.

    Parameters
    ----------
    scene : Scene
        The sample.
    tip : TipModel
        The NV tip and optics.
    n_lines, n_pixels : int
        Scan size.
    pixel_m : float
        Pixel pitch on both axes, m.
    freq_hz : ndarray, shape (n_freq,)
        Microwave sweep, Hz, strictly increasing.
    faults : sequence of Fault
        Faults; only the kinds in :data:`demo_stream.faults.PIXEL_FAULTS` act here.
    trace_retrace : bool
        Whether each line also has a backward trace (for the instrument clock).
    oversample : int
        See :func:`render_field_t`.
    """

    def __init__(
        self,
        scene: Scene,
        tip: TipModel,
        *,
        n_lines: int,
        n_pixels: int,
        pixel_m: float,
        freq_hz: np.ndarray,
        faults: Sequence[Fault] = (),
        trace_retrace: bool = False,
        oversample: int = 2,
    ) -> None:
        self.scene = scene
        self.tip = tip
        self.n_lines = n_lines
        self.n_pixels = n_pixels
        self.pixel_m = pixel_m
        self.freq_hz = np.asarray(freq_hz, dtype=float)
        self.x_m = scan_axis_m(n_pixels, pixel_m)
        self.y_m = scan_axis_m(n_lines, pixel_m)
        self.faults = tuple(f for f in faults if f.kind in PIXEL_FAULTS)
        self._passes = 2 if trace_retrace else 1
        self._pixel_time_s = self.freq_hz.size * tip.dwell_s
        self._bias = np.asarray(tip.bias_field_t, dtype=float)
        self._axis = nv_axis(tip.nv_theta_rad, tip.nv_phi_rad)
        self._zfs_hz = tip.zfs_hz
        self._zfs_drift_hz_per_s = tip.zfs_drift_hz_per_hour / 3600.0
        self._fields = _FieldCache(scene, self.x_m, self.y_m, oversample)
        self._fields.get(tip.standoff_m)  # the base map, once per scan

    def truth(self, line_index: int, backward: bool) -> TraceTruth:
        """The true per-pixel state of one trace (no noise)."""
        n = self.n_pixels
        tip = self.tip
        seq = line_index * self._passes + (1 if backward else 0)
        position = np.arange(n)[::-1] if backward else np.arange(n)
        time_s = (seq * n + position + 0.5) * self._pixel_time_s
        pl = np.ones(n)
        contrast = np.full(n, tip.contrast)
        standoff = np.full(n, tip.standoff_m)
        zfs = self._zfs_hz + self._zfs_drift_hz_per_s * time_s
        for fault in self.faults:
            mask = fault_mask(fault, line_index, backward, n)
            if not mask.any():
                continue
            p = fault.params
            if "pl_factor" in p:
                pl[mask] *= p["pl_factor"]
            if "contrast_factor" in p:
                contrast[mask] *= p["contrast_factor"]
            if fault.kind == "tip_crash":
                standoff[mask] += p["standoff_step_m"]
            if fault.kind == "sample_touched":
                zfs[mask] += p["zfs_shift_hz"]

        scene_b = np.empty((n, 3))
        for d in np.unique(standoff):
            cols = standoff == d
            scene_b[cols] = self._fields.get(float(d))[:, line_index, cols].T
        b = scene_b + self._bias

        rate = (
            tip.count_rate_cps
            * pl
            * pl_drift_factor(time_s, tip.pl_drift_per_hour, tip.pl_wobble, tip.pl_wobble_period_s)
            * pl_step_factor(time_s, tip.pl_step_fraction, tip.pl_step_at_s)
        )
        freqs = transition_frequencies_hz(
            to_nv_frame(b, tip.nv_theta_rad, tip.nv_phi_rad), zfs, tip.strain_hz
        )
        return TraceTruth(
            field_xyz_t=b,
            field_nv_t=b @ self._axis,
            field_abs_t=np.linalg.norm(b, axis=1),
            f_lo_hz=freqs[:, 0],
            f_hi_hz=freqs[:, 1],
            zfs_hz=zfs,
            standoff_m=standoff,
            pl_rate_cps=rate,
            contrast=contrast,
            time_s=time_s,
        )

    def expected_counts(self, truth: TraceTruth) -> np.ndarray:
        """Expected counts per sample, shape (n_pixels, n_freq), column order.

        Two Lorentzian dips of depth ``contrast`` and width ``fwhm_hz`` at the true
        transitions, on a baseline of ``pl_rate_cps * dwell_s`` counts
        (:func:`strayline.physics.spectrum.lorentzian_dips`).
        """
        centers = np.stack([truth.f_lo_hz, truth.f_hi_hz], axis=-1)
        contrast = np.repeat(truth.contrast[:, None], 2, axis=1)
        baseline = truth.pl_rate_cps * self.tip.dwell_s
        return lorentzian_dips(
            self.freq_hz,
            centers,
            contrast,
            self.tip.fwhm_hz,
            baseline,
            hyperfine=self.tip.hyperfine,  # type: ignore[arg-type]  # checked in TipModel
        )

    def render_trace(
        self, line_index: int, backward: bool, rng: np.random.Generator
    ) -> tuple[np.ndarray, TraceTruth]:
        """Noisy counts (Poisson) and the truth of one trace.

        Returns
        -------
        counts : ndarray of uint32, shape (n_pixels, n_freq)
            Photon counts, column order (increasing x).
        truth : TraceTruth
        """
        truth = self.truth(line_index, backward)
        counts = rng.poisson(self.expected_counts(truth)).astype(np.uint32)
        return counts, truth

    @property
    def field_maps_t(self) -> Mapping[float, np.ndarray]:
        """Scene field maps rendered so far, by stand-off (m): shape (3, n_lines, n_pixels)."""
        return MappingProxyType(self._fields.maps)
