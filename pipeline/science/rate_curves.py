"""The points of a fitted rate law that a chart draws: the curve and its pointwise 95 % band."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.plain_data import to_plain

CURVE_POINTS = 64


@dataclass(frozen=True)
class RateCurve:
    """Rates of a fitted rate law at substrate levels; band ends are None where not known.

    Units follow the fit: substrate as the fitted substrate, rates as the fitted rates.
    """

    substrate: tuple[float, ...]
    rate: tuple[float, ...]
    band_low: tuple[float, ...] | None
    band_high: tuple[float, ...] | None

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping (NaN becomes None)."""
        return dict(to_plain(self))


def curve_substrate(tested: ArrayLike, km: float) -> NDArray[np.float64]:
    """Substrate levels for drawing a rate law: S = 1.04 · S_top · u², u evenly spaced in [0, 1].

    S_top = max(highest tested level, 2 Km); u² puts the points close where the curve bends.
    """
    s = np.asarray(tested, dtype=float)
    top = max([float(x) for x in s if np.isfinite(x)] + [2.0 * km])
    return top * 1.04 * np.linspace(0.0, 1.0, CURVE_POINTS) ** 2


def rate_curve(substrate: NDArray[np.float64], rate: NDArray[np.float64],
               half_width: NDArray[np.float64] | None) -> RateCurve:
    """The curve and, where ``half_width`` is given, the band rate -/+ half-width."""
    def floats(values: NDArray[np.float64]) -> tuple[float, ...]:
        return tuple(float(v) for v in values)

    if half_width is None:
        return RateCurve(floats(substrate), floats(rate), None, None)
    return RateCurve(floats(substrate), floats(rate), floats(rate - half_width), floats(rate + half_width))
