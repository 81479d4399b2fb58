"""Scan-line files (contract version 1): the :class:`ScanLine` record, reader and writer.

The full contract is in ``docs/line-file.md``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Literal

import numpy as np

FORMAT_NAME = "strayline-line"
FORMAT_VERSION = 1

Direction = Literal["forward", "backward"]


@dataclass(frozen=True, eq=False)
class ScanLine:
    """One completed scan line, validated.

    Attributes
    ----------
    source : Path
        The file it was read from (or will be written to).
    scan_id : str
        Identifier of the scan; names the store ``<scan_id>.zarr``.
    line_index : int
        Index along the slow axis, from 0.
    n_lines_planned : int
        Number of lines the scan will have.
    direction : {"forward", "backward"}
        Fast-axis direction of this trace.
    start_time, end_time : datetime
        Acquisition start and end, timezone-aware UTC.
    dwell_s : float
        Integration time per (pixel, frequency) sample, s.
    nv_theta_rad, nv_phi_rad : float
        NV axis polar and azimuthal angle in the scan frame, rad.
    freq_hz : ndarray, shape (n_freq,)
        Microwave frequencies, Hz, strictly increasing (may be non-uniform).
    counts : ndarray, shape (n_pixels, n_freq)
        Photon counts per sample (integer or float, finite, >= 0).
    x_m : ndarray, shape (n_pixels,)
        Fast-axis pixel positions, m.
    y_m : float
        Slow-axis position of the line, m.
    temperature_k : float or None
        Sample/tip temperature, K, if the instrument knows it.
    profile : str or None
        Sample-type profile name requested by the acquisition side.
    reference_counts : ndarray, shape (n_pixels, n_freq), or None
        Counts with the microwave off, if recorded.
    aux : Mapping[str, ndarray]
        Auxiliary per-pixel channels, each shape (n_pixels,).
    aux_units : Mapping[str, str]
        Unit of each auxiliary channel.
    sha256 : str or None
        Hex SHA-256 of the file's bytes as read (None for a line not read from disk).
    """

    source: Path
    scan_id: str
    line_index: int
    n_lines_planned: int
    direction: Direction
    start_time: datetime
    end_time: datetime
    dwell_s: float
    nv_theta_rad: float
    nv_phi_rad: float
    freq_hz: np.ndarray
    counts: np.ndarray
    x_m: np.ndarray
    y_m: float
    temperature_k: float | None = None
    profile: str | None = None
    reference_counts: np.ndarray | None = None
    aux: Mapping[str, np.ndarray] = field(default_factory=dict)
    aux_units: Mapping[str, str] = field(default_factory=dict)
    sha256: str | None = None

    @property
    def n_pixels(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_freq(self) -> int:
        return int(self.freq_hz.shape[0])
