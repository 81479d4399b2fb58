"""Where each parameter sits in a row of the batched fit (:mod:`strayline.fit._kernel`)."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Layout"]


@dataclass(frozen=True)
class Layout:
    """Where each parameter sits in a kernel row."""

    n_dips: int
    n_widths: int
    has_slope: bool

    @property
    def n_par(self) -> int:
        return 2 * self.n_dips + self.n_widths + 1 + int(self.has_slope)

    @property
    def i_baseline(self) -> int:
        return 2 * self.n_dips + self.n_widths
