"""A line's raw spectra in its scan's store (``raw/<direction>/<line_index>``): written
with the line when ``store.raw_spectra`` is on, read back to fit the line again
(``strayline refit``) with everything its fit and its rules used."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import zarr

from strayline.lines import ScanLine
from strayline.store._ledger import format_time, parse_time

__all__ = ["RawSpectra", "read_raw_group", "write_raw_group"]


@dataclass(frozen=True, eq=False)
class RawSpectra:
    """The raw spectra of one stored line, enough to fit and judge it again.

    Attributes
    ----------
    freq_hz : ndarray, shape (n_freq,)
        Microwave frequencies, Hz.
    counts : ndarray, shape (n_pixels, n_freq)
        Photon counts per sample, in the line file's dtype.
    x_m : ndarray, shape (n_pixels,)
        Fast-axis pixel positions, m.
    reference_counts : ndarray, shape (n_pixels, n_freq), or None
        Counts with the microwave off, if recorded.
    dwell_s : float
        Integration time per sample, s.
    y_m : float
        Slow-axis position, m.
    nv_theta_rad, nv_phi_rad : float
        NV axis orientation in the scan frame, rad.
    start_time, end_time : datetime
        Acquisition window, aware UTC.
    source : str
        The line file it was read from.
    sha256 : str or None
        Hex SHA-256 of that file's bytes.
    temperature_k : float or None
        The line file's tip temperature, K, which sets D when the config derives it from
        the temperature (None: the file had none, or the store predates this record).
    profile : str or None
        The sample-type profile the line file asked for (None: none, or an older store).
    aux, aux_units : Mapping
        The line's auxiliary per-pixel channels and their units (empty: none, or a store
        that predates this record).
    tip_id : str or None
        The tip the line file named (None: none, or an older store).
    """

    line_index: int
    direction: str
    freq_hz: np.ndarray
    counts: np.ndarray
    x_m: np.ndarray
    reference_counts: np.ndarray | None
    dwell_s: float
    y_m: float
    nv_theta_rad: float
    nv_phi_rad: float
    start_time: datetime
    end_time: datetime
    source: str
    sha256: str | None
    temperature_k: float | None = None
    profile: str | None = None
    aux: Mapping[str, np.ndarray] = field(default_factory=lambda: MappingProxyType({}))
    aux_units: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))
    tip_id: str | None = None

    def scan_line(self, scan_id: str, n_lines_planned: int, source: Path) -> ScanLine:
        """The line as the line file gave it, named ``source`` (where it is read from now)
        and keeping the file's checksum."""
        return ScanLine(
            source=source,
            scan_id=scan_id,
            line_index=self.line_index,
            n_lines_planned=n_lines_planned,
            direction=self.direction,  # type: ignore[arg-type]
            start_time=self.start_time,
            end_time=self.end_time,
            dwell_s=self.dwell_s,
            nv_theta_rad=self.nv_theta_rad,
            nv_phi_rad=self.nv_phi_rad,
            freq_hz=self.freq_hz,
            counts=self.counts,
            x_m=self.x_m,
            y_m=self.y_m,
            temperature_k=self.temperature_k,
            profile=self.profile,
            reference_counts=self.reference_counts,
            aux=dict(self.aux),
            aux_units=dict(self.aux_units),
            sha256=self.sha256,
            tip_id=self.tip_id,
        )


def write_raw_group(parent: zarr.Group, line: ScanLine, compressors: Any) -> None:
    """Store ``line``'s spectra as group ``<line_index>`` of ``parent``."""
    group = parent.create_group(
        str(line.line_index),
        attributes={
            "dwell_s": float(line.dwell_s),
            "y_m": float(line.y_m),
            "nv_theta_rad": float(line.nv_theta_rad),
            "nv_phi_rad": float(line.nv_phi_rad),
            "start_time": format_time(line.start_time),
            "end_time": format_time(line.end_time),
            "source": str(line.source),
            "sha256": line.sha256,
            # what a refit needs beyond the spectra: D may follow the temperature,
            # and the profile chooses the fit model
            "temperature_k": None if line.temperature_k is None else float(line.temperature_k),
            "profile": line.profile,
            "tip_id": line.tip_id,
        },
    )
    arrays: dict[str, tuple[np.ndarray, tuple[str, ...], str]] = {
        "counts": (np.asarray(line.counts), ("x", "freq"), "counts"),
        "freq_hz": (np.asarray(line.freq_hz, dtype=np.float64), ("freq",), "Hz"),
        "x_m": (np.asarray(line.x_m, dtype=np.float64), ("x",), "m"),
    }
    if line.reference_counts is not None:
        reference = np.asarray(line.reference_counts)
        arrays["reference_counts"] = (reference, ("x", "freq"), "counts")
    _put_arrays(group, arrays, compressors)
    if line.aux:  # the rules may read them (aux.<channel>.<stat> metrics)
        channels = {
            name: (np.asarray(values, dtype=np.float64), ("x",), line.aux_units.get(name, ""))
            for name, values in line.aux.items()
        }
        _put_arrays(group.create_group("aux"), channels, compressors)


def _put_arrays(
    group: zarr.Group,
    arrays: Mapping[str, tuple[np.ndarray, tuple[str, ...], str]],
    compressors: Any,
) -> None:
    for name, (data, dims, units) in arrays.items():
        group.create_array(
            name,
            data=data,
            chunks=data.shape,
            compressors=compressors,
            dimension_names=dims,
            attributes={"units": units},
        )


def read_raw_group(group: zarr.Group, line_index: int, direction: str) -> RawSpectra:
    """The :class:`RawSpectra` stored in ``group`` (as :func:`write_raw_group` wrote it).

    Raises
    ------
    KeyError, ValueError, TypeError
        If the group lacks an array or attribute, or holds one of the wrong kind.
    """
    attrs = group.attrs.asdict()
    reference = _array(group, "reference_counts") if "reference_counts" in group else None
    aux: dict[str, np.ndarray] = {}
    aux_units: dict[str, str] = {}
    if "aux" in group:
        channels = group["aux"]
        if not isinstance(channels, zarr.Group):
            raise TypeError("aux must be a group")
        for name, array in sorted(channels.arrays()):
            aux[name] = np.asarray(array[:], dtype=np.float64)
            aux_units[name] = str(array.attrs.get("units", ""))
    temperature = attrs.get("temperature_k")
    profile = attrs.get("profile")
    sha256 = attrs.get("sha256")
    tip_id = attrs.get("tip_id")
    return RawSpectra(
        line_index=line_index,
        direction=direction,
        freq_hz=_array(group, "freq_hz"),
        counts=_array(group, "counts"),
        x_m=_array(group, "x_m"),
        reference_counts=reference,
        dwell_s=float(attrs["dwell_s"]),  # type: ignore[arg-type]
        y_m=float(attrs["y_m"]),  # type: ignore[arg-type]
        nv_theta_rad=float(attrs["nv_theta_rad"]),  # type: ignore[arg-type]
        nv_phi_rad=float(attrs["nv_phi_rad"]),  # type: ignore[arg-type]
        start_time=parse_time(str(attrs["start_time"])),
        end_time=parse_time(str(attrs["end_time"])),
        source=str(attrs["source"]),
        sha256=None if sha256 is None else str(sha256),
        temperature_k=None if temperature is None else float(temperature),  # type: ignore[arg-type]
        profile=None if profile is None else str(profile),
        aux=MappingProxyType(aux),
        aux_units=MappingProxyType(aux_units),
        tip_id=None if tip_id is None else str(tip_id),
    )


def _array(group: zarr.Group, name: str) -> np.ndarray:
    node = group[name]
    if not isinstance(node, zarr.Array):
        raise TypeError(f"{name} must be an array; found a group")
    return np.asarray(node[:])
