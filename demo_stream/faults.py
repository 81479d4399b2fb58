"""Faults: what can go wrong during a scan, scheduled at chosen lines and pixels.

A :class:`Fault` is a frozen record; :func:`parse_fault` reads the compact command-line
form and :func:`fault_to_spec` writes it back.

Compact form::

    KIND@LINE[:PIXEL][-END_LINE][,KEY=VALUE ...]

    tip_crash@40:64                     line 40 from pixel 64 on, persists
    fluorescence_lost@60-70             lines 60 to 70 (inclusive)
    sample_touched@12:30-14,width_pixels=5,zfs_shift_hz=6e6
    acquisition_stalled@20,pause_lines=8

Time and place
--------------
Pixels are columns of the scan grid (0 = smallest x). Each line is acquired forward
(columns in increasing order) and then, with trace/retrace, backward (decreasing order).
A *time-like* fault (``fluorescence_lost``, ``contrast_collapsed``, ``tip_crash``) starts
at the moment the forward trace of ``start_line`` reaches ``start_pixel``, so it covers
the rest of that forward trace, the whole backward trace of that line and every later
trace up to the end of ``end_line`` (``None``: to the end of the scan). A
``sample_touched`` fault is local: the rectangle of lines ``start_line..end_line`` and
columns ``start_pixel .. start_pixel + width_pixels - 1``, in both traces. The three
file-level faults (``acquisition_stalled``, ``slow_in_place_write``, ``corrupt_file``)
act on the files of lines ``start_line..end_line`` (default: ``start_line`` only).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np

__all__ = [
    "FAULT_KINDS",
    "PIXEL_FAULTS",
    "Fault",
    "fault_from_dict",
    "fault_lines",
    "fault_mask",
    "fault_to_dict",
    "fault_to_spec",
    "parse_fault",
]

#: Every fault kind with its parameters and their defaults (SI units in the names).
FAULT_KINDS: Mapping[str, Mapping[str, float]] = MappingProxyType(
    {
        # PL falls to a background fraction of the normal rate; the ODMR dips vanish.
        "fluorescence_lost": MappingProxyType({"pl_factor": 0.05, "contrast_factor": 0.0}),
        # Microwave off: PL normal, no dips.
        "contrast_collapsed": MappingProxyType({"contrast_factor": 0.0}),
        # The tip touches the sample: stand-off grows and PL drops, for good.
        "tip_crash": MappingProxyType({"standoff_step_m": 20e-9, "pl_factor": 0.7}),
        # A local touch: contact strain shifts D (common mode) for a few pixels and lines,
        # and may dim the PL there (pl_factor 1: it does not).
        "sample_touched": MappingProxyType(
            {"zfs_shift_hz": 4e6, "width_pixels": 6.0, "pl_factor": 1.0}
        ),
        # The writer pauses before the line: pause_s, or pause_lines x the pace when
        # pause_s is 0.
        "acquisition_stalled": MappingProxyType({"pause_lines": 5.0, "pause_s": 0.0}),
        # The file is written in place at its final name, in chunks, over duration_s.
        "slow_in_place_write": MappingProxyType({"duration_s": 3.0, "n_chunks": 6.0}),
        # The file is damaged: mode 0 truncates it to keep_fraction of its bytes, mode 1
        # garbles its first bytes (the format signature) and keeps its size.
        "corrupt_file": MappingProxyType({"mode": 0.0, "keep_fraction": 0.5}),
    }
)

#: Kinds that change the physics of pixels (the others act on files and time).
PIXEL_FAULTS = frozenset({"fluorescence_lost", "contrast_collapsed", "tip_crash", "sample_touched"})
_TIME_LIKE = frozenset({"fluorescence_lost", "contrast_collapsed", "tip_crash"})
_SPEC = re.compile(
    r"^(?P<kind>[a-z_]+)@(?P<line>\d+)(?::(?P<pixel>\d+))?(?:-(?P<end>\d+))?"
    r"(?P<params>(?:,[^,]*)*)$"
)


@dataclass(frozen=True)
class Fault:
    """One scheduled fault.

    Attributes
    ----------
    kind : str
        A key of :data:`FAULT_KINDS`.
    start_line : int
        First line affected.
    start_pixel : int
        First column affected in ``start_line`` (time-like faults) or the first column of
        the touched rectangle (``sample_touched``); 0 otherwise.
    end_line : int or None
        Last line affected, inclusive; None means it persists to the end of the scan
        (file-level faults and ``sample_touched`` then act on ``start_line`` only).
    params : Mapping[str, float]
        The kind's parameters, defaults filled in.
    """

    kind: str
    start_line: int
    start_pixel: int = 0
    end_line: int | None = None
    params: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        where = f"fault {self.kind!r}"
        if self.kind not in FAULT_KINDS:
            raise ValueError(
                f"fault kind must be one of {', '.join(FAULT_KINDS)}; found {self.kind!r}"
            )
        if self.start_line < 0 or self.start_pixel < 0:
            raise ValueError(
                f"{where}: line and pixel must be >= 0; "
                f"found line {self.start_line}, pixel {self.start_pixel}"
            )
        if self.end_line is not None and self.end_line < self.start_line:
            raise ValueError(
                f"{where}: end line must be >= start line {self.start_line}; found {self.end_line}"
            )
        defaults = FAULT_KINDS[self.kind]
        unknown = sorted(set(self.params) - set(defaults))
        if unknown:
            raise ValueError(
                f"{where}: parameters must be among {', '.join(defaults)}; "
                f"found {', '.join(unknown)}"
            )
        merged = {**defaults, **{k: float(v) for k, v in self.params.items()}}
        bad = [k for k, v in merged.items() if not math.isfinite(v)]
        if bad:
            raise ValueError(f"{where}: parameters must be finite; found {bad[0]}={merged[bad[0]]}")
        _check_kind_params(self.kind, merged)
        object.__setattr__(self, "params", MappingProxyType(merged))

    @property
    def last_line(self) -> int | None:
        """Last line affected (inclusive), None when the fault persists to the end."""
        if self.end_line is not None:
            return self.end_line
        return None if self.kind in _TIME_LIKE else self.start_line


def _check_kind_params(kind: str, p: Mapping[str, float]) -> None:
    where = f"fault {kind!r}"
    for key in ("pl_factor", "contrast_factor"):
        if key in p and not 0.0 <= p[key] <= 1.0:
            raise ValueError(f"{where}: {key} must be in [0, 1]; found {p[key]}")
    if kind == "tip_crash" and p["standoff_step_m"] < 0:
        raise ValueError(f"{where}: standoff_step_m must be >= 0; found {p['standoff_step_m']}")
    if kind == "sample_touched" and (p["width_pixels"] < 1 or p["width_pixels"] % 1):
        raise ValueError(
            f"{where}: width_pixels must be a whole number >= 1; found {p['width_pixels']}"
        )
    if kind == "acquisition_stalled" and (p["pause_lines"] < 0 or p["pause_s"] < 0):
        raise ValueError(
            f"{where}: pause_lines and pause_s must be >= 0; "
            f"found {p['pause_lines']}, {p['pause_s']}"
        )
    if kind == "slow_in_place_write" and (p["duration_s"] < 0 or p["n_chunks"] < 1):
        raise ValueError(
            f"{where}: duration_s must be >= 0 and n_chunks >= 1; "
            f"found {p['duration_s']}, {p['n_chunks']}"
        )
    if kind == "corrupt_file" and (p["mode"] not in (0.0, 1.0) or not 0 <= p["keep_fraction"] < 1):
        raise ValueError(
            f"{where}: mode must be 0 (truncate) or 1 (garble) and keep_fraction "
            f"in [0, 1); found {p['mode']}, {p['keep_fraction']}"
        )


def parse_fault(spec: str) -> Fault:
    """Read a fault from its compact form ``KIND@LINE[:PIXEL][-END][,KEY=VALUE ...]``.

    Raises
    ------
    ValueError
        The message quotes the spec, says which part is wrong and what was expected.
    """
    text = spec.strip()
    match = _SPEC.match(text)
    if match is None:
        raise ValueError(
            f"fault {spec!r} must look like KIND@LINE[:PIXEL][-END_LINE][,KEY=VALUE...], "
            f"e.g. tip_crash@40:64 or fluorescence_lost@60-70"
        )
    params: dict[str, float] = {}
    for item in filter(None, match["params"].split(",")):
        key, sep, value = item.partition("=")
        try:
            if not sep:
                raise ValueError
            params[key.strip()] = float(value)
        except ValueError:
            raise ValueError(
                f"fault {spec!r}: parameter must be KEY=NUMBER; found {item!r}"
            ) from None
    try:
        return Fault(
            kind=match["kind"],
            start_line=int(match["line"]),
            start_pixel=int(match["pixel"] or 0),
            end_line=None if match["end"] is None else int(match["end"]),
            params=params,
        )
    except ValueError as exc:
        raise ValueError(f"fault {spec!r}: {exc}") from None


def fault_to_spec(fault: Fault) -> str:
    """The compact form of ``fault``; ``parse_fault(fault_to_spec(f)) == f``."""
    text = f"{fault.kind}@{fault.start_line}"
    if fault.start_pixel:
        text += f":{fault.start_pixel}"
    if fault.end_line is not None:
        text += f"-{fault.end_line}"
    defaults = FAULT_KINDS[fault.kind]
    for key, value in fault.params.items():
        if value != defaults[key]:
            text += f",{key}={value!r}"
    return text


def fault_to_dict(fault: Fault) -> dict[str, Any]:
    """A JSON-ready dict of ``fault`` (every parameter, defaults included)."""
    return {
        "kind": fault.kind,
        "start_line": fault.start_line,
        "start_pixel": fault.start_pixel,
        "end_line": fault.end_line,
        "last_line": fault.last_line,
        "params": dict(fault.params),
        "spec": fault_to_spec(fault),
    }


def fault_from_dict(data: Mapping[str, Any]) -> Fault:
    """Inverse of :func:`fault_to_dict`."""
    return Fault(
        kind=data["kind"],
        start_line=int(data["start_line"]),
        start_pixel=int(data["start_pixel"]),
        end_line=None if data["end_line"] is None else int(data["end_line"]),
        params=dict(data["params"]),
    )


def fault_lines(fault: Fault, n_lines: int) -> range:
    """The lines whose files or pixels ``fault`` touches, within a scan of ``n_lines``."""
    last = fault.last_line
    stop = n_lines if last is None else min(last + 1, n_lines)
    return range(min(fault.start_line, n_lines), stop)


def fault_mask(fault: Fault, line_index: int, backward: bool, n_pixels: int) -> np.ndarray:
    """Which columns of one trace a pixel fault affects.

    Parameters
    ----------
    fault : Fault
        A fault of a kind in :data:`PIXEL_FAULTS`.
    line_index : int
        The line.
    backward : bool
        True for the backward (retrace) trace of the line.
    n_pixels : int
        Pixels per line.

    Returns
    -------
    ndarray of bool, shape (n_pixels,)
        True at affected columns (column 0 = smallest x), whatever the trace direction.
    """
    mask = np.zeros(n_pixels, dtype=bool)
    if fault.kind not in PIXEL_FAULTS or line_index not in fault_lines(fault, 1 << 62):
        return mask
    if fault.kind == "sample_touched":
        width = int(fault.params["width_pixels"])
        mask[fault.start_pixel : fault.start_pixel + width] = True
    elif line_index > fault.start_line or backward:
        mask[:] = True
    else:
        mask[fault.start_pixel :] = True
    return mask
