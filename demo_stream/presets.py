"""Signal presets of the demo instrument: the range of ODMR signal a lab meets.

Each preset sets the count rate, dwell, dip depth and width, hyperfine structure and the
microwave sweep; the tip's other settings (stand-off, axis, bias field, drifts) stay as
given. Counts per sample off resonance are ``count_rate_cps × dwell_s``.

| preset | counts/sample | dips | sweep |
|---|---|---|---|
| ``strong`` | 600 | 15 %, FWHM 10 MHz | 2.66–3.08 GHz, 201 points |
| ``weak-wide`` | 600 | 9 %, FWHM 9 MHz | 2.72–3.02 GHz, 161 points (1.9 MHz step) |
| ``very-weak`` | 200 | 8 %, FWHM 10 MHz | 2.66–3.08 GHz, 201 points |
| ``narrow-14n`` | 2000 | 10 %, FWHM 0.8 MHz, ¹⁴N | two 120 MHz windows, 0.2 MHz step (*) |
| ``cryo-film`` | 300 | 10 %, FWHM 6 MHz | 80 MHz around D at 4 K, 121 points (†) |

(*) around the resonances of the default bias, 3 mT along the NV axis.
(†) a tip at 4 K (D = 2877.7 MHz there), no bias, over a sample of weak fields (the
demo's ``weak_domains`` scene by default), which stay inside the short sweep.

The values are ours, chosen to span CW ODMR of a single shallow NV in a scanning tip
(linewidth 5–15 MHz at full power, contrast 5–30 %, 10⁵–10⁶ counts/s: common practice),
down to the low-power regime where the ¹⁴N triplet (2.16 MHz spacing) is resolved.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from demo_stream.tip import TipModel
from strayline.physics import D_ROOM_HZ, GAMMA_NV_HZ_PER_T, zfs_hz

__all__ = ["PRESETS", "SignalPreset"]


@dataclass(frozen=True)
class SignalPreset:
    """One signal level of the demo instrument."""

    name: str
    description: str
    count_rate_cps: float
    dwell_s: float
    contrast: float
    fwhm_hz: float
    hyperfine: str | None
    windows_hz: tuple[tuple[float, float, int], ...]  # (start, stop, points) per window
    bias_along_nv_t: float | None = None  # the bias its sweep is laid out for, if any
    temperature_k: float | None = None  # the tip's temperature, if not the demo's default
    scene: str = "labyrinth"  # the demo sample whose fields the sweep holds

    def freq_hz(self) -> np.ndarray:
        """The sweep, Hz, strictly increasing (the windows in order)."""
        return np.concatenate([np.linspace(a, b, n) for a, b, n in self.windows_hz])

    def tip_values(self) -> dict[str, object]:
        """The :class:`~demo_stream.tip.TipModel` fields this preset sets."""
        values: dict[str, object] = {
            "count_rate_cps": self.count_rate_cps,
            "dwell_s": self.dwell_s,
            "contrast": self.contrast,
            "fwhm_hz": self.fwhm_hz,
            "hyperfine": self.hyperfine,
        }
        if self.temperature_k is not None:
            values["temperature_k"] = self.temperature_k
        if self.bias_along_nv_t == 0.0:  # a sweep around D: no bias (the tip's is 3 mT)
            values["bias_field_t"] = (0.0, 0.0, 0.0)
        return values

    @property
    def zfs_hz(self) -> float:
        """D at the preset's temperature (room temperature when it sets none), Hz."""
        return D_ROOM_HZ if self.temperature_k is None else float(zfs_hz(self.temperature_k))


_SPLIT_3MT_HZ = GAMMA_NV_HZ_PER_T * 3e-3  # resonance shift of the default bias, Hz
_D_4K_HZ = float(zfs_hz(4.0))  # D of a tip at 4 K, Hz

PRESETS: dict[str, SignalPreset] = {
    preset.name: preset
    for preset in (
        SignalPreset(
            "strong",
            "bright NV, deep dips, a wide sweep (the default)",
            count_rate_cps=TipModel.count_rate_cps,
            dwell_s=TipModel.dwell_s,
            contrast=TipModel.contrast,
            fwhm_hz=TipModel.fwhm_hz,
            hyperfine=None,
            windows_hz=((2.66e9, 3.08e9, 201),),
        ),
        SignalPreset(
            "weak-wide",
            "an ordinary wide sweep at modest signal: each dip ~5σ under a matched filter",
            count_rate_cps=1.2e5,
            dwell_s=5e-3,
            contrast=0.09,
            fwhm_hz=9e6,
            hyperfine=None,
            windows_hz=((2.72e9, 3.02e9, 161),),
        ),
        SignalPreset(
            "very-weak",
            "a dim NV and a short dwell: 200 counts per sample",
            count_rate_cps=1e5,
            dwell_s=2e-3,
            contrast=0.08,
            fwhm_hz=10e6,
            hyperfine=None,
            windows_hz=((2.66e9, 3.08e9, 201),),
        ),
        SignalPreset(
            "narrow-14n",
            "low microwave and laser power: narrow lines with the 14N triplet resolved",
            count_rate_cps=1e5,
            dwell_s=20e-3,
            contrast=0.10,
            fwhm_hz=0.8e6,
            hyperfine="14N",
            windows_hz=(
                (D_ROOM_HZ - _SPLIT_3MT_HZ - 60e6, D_ROOM_HZ - _SPLIT_3MT_HZ + 60e6, 601),
                (D_ROOM_HZ + _SPLIT_3MT_HZ - 60e6, D_ROOM_HZ + _SPLIT_3MT_HZ + 60e6, 601),
            ),
            bias_along_nv_t=3e-3,
        ),
        SignalPreset(
            "cryo-film",
            "a tip at 4 K over a thin film: a short sweep around D, modest counts",
            count_rate_cps=6e4,
            dwell_s=5e-3,
            contrast=0.10,
            fwhm_hz=6e6,
            hyperfine=None,
            windows_hz=((_D_4K_HZ - 40e6, _D_4K_HZ + 40e6, 121),),
            bias_along_nv_t=0.0,
            temperature_k=4.0,
            scene="weak_domains",
        ),
    )
}
