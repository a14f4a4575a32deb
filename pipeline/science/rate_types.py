"""The vocabulary, settings and results of initial rates (``pipeline.science.rates``)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from enum import StrEnum
from typing import Any

import numpy as np
import numpy.typing as npt

from pipeline.errors import SpecificationError
from pipeline.plain_data import to_plain

FloatArray = npt.NDArray[np.float64]

POWER = 0.80  # the power at which the curvature test's detectable change is stated
# Residual SD below which no lack of fit is judged (round-off on exact data): far below any
# reader's resolution (0.0001 AU is common practice for plate readers).
ROUND_OFF_AU = 1e-6


class RateFlag(StrEnum):
    """Why a well has no usable initial rate."""

    TOO_FEW_POINTS = "too-few-points"
    SATURATED = "saturated"
    NON_FINITE = "non-finite"
    CONVERSION_LIMIT = "conversion-limit"
    LAG = "lag"
    BURST = "burst"


class ShapeAction(StrEnum):
    """What a well with a lag or a burst gives, as the method says."""

    EXCLUDE = "exclude"
    STEADY_STATE = "steady-state"


class SlopeKind(StrEnum):
    INITIAL = "initial"  # quadratic from the first read, slope at the first read
    STEADY_STATE = "steady-state"  # quadratic from a later read, after a lag or burst
    WHOLE_READ = "blank-line"  # straight line over a blank's whole read (or fixed window)


# --------------------------------------------------------------------------- settings and results


@dataclass(frozen=True)
class RateWindowSettings:
    """Method parameters of the initial-rate window (defaults: common practice)."""

    min_points: int = 5
    linear_limit_au: float = 2.0
    max_conversion: float = 0.10
    max_slope_change: float = 0.10
    curvature_alpha: float = 0.01
    shape_action: ShapeAction = ShapeAction.EXCLUDE
    blank_window_min: float | None = None

    def __post_init__(self) -> None:
        if isinstance(self.min_points, bool) or not isinstance(self.min_points, int):
            raise SpecificationError(f"min_points must be a whole number; received {self.min_points!r}")
        if self.min_points < 5:
            raise SpecificationError(
                f"min_points must be at least 5 (a quadratic and 2 degrees of freedom for its "
                f"curvature test); received {self.min_points}"
            )
        checks = (
            ("linear_limit_au", self.linear_limit_au, 0.0, np.inf, "a positive absorbance"),
            ("max_conversion", self.max_conversion, 0.0, 0.5, "a fraction above 0 and at most 0.5"),
            ("max_slope_change", self.max_slope_change, 0.0, np.inf, "a positive fraction"),
            ("curvature_alpha", self.curvature_alpha, 0.0, 0.5, "between 0 and 0.5"),
        )
        for name, value, low, high, allowed in checks:
            number = value if isinstance(value, int | float) and not isinstance(value, bool) else None
            if number is None or not np.isfinite(number) or not (low < number <= high):
                raise SpecificationError(f"{name} must be {allowed}; received {value!r}")
        try:
            object.__setattr__(self, "shape_action", ShapeAction(self.shape_action))
        except ValueError as exc:
            raise SpecificationError(
                f"shape_action must be one of {[a.value for a in ShapeAction]}; received {self.shape_action!r}"
            ) from exc
        window = self.blank_window_min
        if window is not None and (isinstance(window, bool) or not isinstance(window, int | float)
                                   or not np.isfinite(window) or window <= 0):
            raise SpecificationError(f"blank_window_min must be a positive time in minutes or absent; received {window!r}")

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, Any]) -> RateWindowSettings:
        """Build settings from a method file section; unknown keys are an error."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(mapping) - known)
        if unknown:
            raise SpecificationError(f"unknown rate-window setting(s) {unknown}; allowed: {sorted(known)}")
        return cls(**dict(mapping))

    def to_dict(self) -> dict[str, Any]:
        return dict(to_plain(asdict(self)))


@dataclass(frozen=True)
class WellRate:
    """Initial rate of one well; ``flag`` is None when the rate can be used.

    ``slope_dof`` is the degrees of freedom of the slope's SE (n − 3 for a quadratic, n − 2 for a
    blank's line); ``conversion_pct`` the substrate converted by the window's end;
    ``slope_change_pct`` the fitted change of slope across the window relative to the rate, and
    ``detectable_change_pct`` the change the curvature test finds with 80 % probability.
    """

    well: str
    slope_au_per_min: float
    slope_se_au_per_min: float
    intercept_au: float
    r2: float
    window_start_min: float
    window_end_min: float
    n_points: int
    flag: str | None
    reason: str
    slope_dof: int = 0
    conversion_pct: float = float("nan")
    slope_change_pct: float = float("nan")
    detectable_change_pct: float = float("nan")
    shape: str | None = None
    slope_kind: str | None = None

    @property
    def ok(self) -> bool:
        return self.flag is None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = to_plain(vars(self))  # flat fields (a night has ~10^5 wells)
        out["ok"] = self.ok
        return out


@dataclass(frozen=True)
class BlankCorrection:
    """Sample rates minus the mean blank rate (spontaneous reaction without enzyme)."""

    corrected_slopes_au_per_min: tuple[float, ...]
    blank_mean_au_per_min: float
    blank_se_au_per_min: float
    n_blanks: int

    def to_dict(self) -> dict[str, Any]:
        return dict(to_plain(self))



@dataclass(frozen=True)
class RateShape:
    """Per well: relative slope change across the window, the change found at 80 % power, lag, burst."""

    change: FloatArray  # relative change of slope across the window (signed: + = speeding up)
    detectable: FloatArray
    lag: npt.NDArray[np.bool_]
    burst: npt.NDArray[np.bool_]


