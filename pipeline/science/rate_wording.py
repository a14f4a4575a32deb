"""One well's initial rate, flag and analyst wording, from the plate's fits (``pipeline.science.rates``)."""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from pipeline.science.lag_fits import STEADY_STATE_TIME_CONSTANTS, LagFits
from pipeline.science.rate_types import (
    RateFlag,
    RateShape,
    RateWindowSettings,
    ShapeAction,
    SlopeKind,
    WellRate,
)

FloatArray = npt.NDArray[np.float64]


def well_result(name: str, i: int, t: FloatArray, a_well: FloatArray, sums: Any, settings: RateWindowSettings,
                 usable: int, cut: str | None, stop: int, blank: bool, limited: bool, quad: Any, line: Any, shape: RateShape,
                 conversion: float, steady_row: int | None, steady_start: int, steady: Any,
                 lag: tuple[LagFits, int] | None = None) -> WellRate:
    """One well's rate, flag and analyst wording."""
    m = settings.min_points
    nan = float("nan")
    cut_text = "" if cut is None else f"; reads from {t[usable]:g} min excluded ({cut})"

    def flagged(flag: RateFlag, text: str, **extra: Any) -> WellRate:
        return WellRate(name, nan, nan, nan, nan, nan, nan, 0, flag.value, f"well {name}: {text}", **extra)

    if stop < m:
        if t.size < m:
            return flagged(RateFlag.TOO_FEW_POINTS, f"only {t.size} reads on the plate; at least {m} are needed")
        if limited and stop < usable:
            return flagged(RateFlag.CONVERSION_LIMIT,
                           f"more than {100 * settings.max_conversion:g} % of the substrate is converted within "
                           f"{stop + 1} reads (by {t[min(stop, t.size - 1)]:g} min); at least {m} reads are needed "
                           f"below the limit: dilute the sample further or read more often")
        if cut == "saturated" and usable < m:
            return flagged(RateFlag.SATURATED, f"only {usable} reads before {t[usable]:g} min, where the well reaches "
                                               f"the linear limit {settings.linear_limit_au:g} AU; at least {m} are needed")
        if cut == "not a number" and usable < m:
            return flagged(RateFlag.NON_FINITE, f"only {usable} reads before {t[usable]:g} min, where the well has a "
                                                f"non-numeric read; at least {m} are needed")
        return flagged(RateFlag.TOO_FEW_POINTS, f"only {stop} reads in the window; at least {m} are needed")

    fits, slope, var = line if blank else quad
    x_to_min = sums.span_min
    start_read = 0
    kind = SlopeKind.WHOLE_READ if blank else SlopeKind.INITIAL
    row = i
    shape_name: str | None = None
    note = ""
    if not blank and (shape.lag[i] or shape.burst[i]):
        shape_name = RateFlag.LAG.value if shape.lag[i] else RateFlag.BURST.value
        what = (("a lag: the first reads rise more slowly" if shape.lag[i] else "a burst: the first reads rise faster")
                + f" than the rest of {t[0]:g}–{t[stop - 1]:g} min allows (fitted slope change "
                f"{100 * float(shape.change[i]):+.0f} %, allowed {100 * settings.max_slope_change:g} %"
                + ("" if shape.lag[i] else f" plus the {100 * conversion:.1f} % converted")
                + f"; or the curve bends more sharply than its read noise allows; tested at {settings.curvature_alpha:g})")
        if shape.lag[i] and lag is not None:
            return _after_lag(name, t, float(sums.y0[i]), stop, conversion, shape, i, lag, what, cut_text, flagged)
        if settings.shape_action is ShapeAction.EXCLUDE or steady_row is None:
            why = "" if settings.shape_action is ShapeAction.EXCLUDE else "; no later stretch is free of it"
            return flagged(RateFlag(shape_name), f"{what}{why}; excluded as the method says",
                           conversion_pct=100 * conversion, slope_change_pct=100 * float(shape.change[i]),
                           shape=shape_name)
        fits, slope, var = steady
        row, start_read, kind = steady_row, steady_start, SlopeKind.STEADY_STATE
        note = f"; {what}: steady-state slope from {t[start_read]:g} min, as the method says"
    b = float(slope[row]) / x_to_min
    se = float(np.sqrt(var[row])) / x_to_min
    x_s = fits.x_start[row]
    beta = fits.beta[row]
    fitted_start = beta[0] + beta[1] * x_s + (beta[2] * x_s * x_s if fits.params == 3 else 0.0)
    intercept = float(sums.y0[i] + fitted_start - b * t[start_read])
    n = int(fits.n[row])
    end = start_read + n - 1
    if blank:
        text = f"blank line over {t[0]:g}–{t[end]:g} min ({n} reads)"
    else:
        text = (f"window {t[start_read]:g}–{t[end]:g} min ({n} reads), "
                f"{100 * conversion:.1f} % of the substrate converted" if np.isfinite(conversion)
                else f"window {t[start_read]:g}–{t[end]:g} min ({n} reads)")
        text += (f"; slope change {100 * float(shape.change[i]):+.1f} % (a change of "
                 f"{100 * float(shape.detectable[i]):.0f} % is found with 80 % probability)")
    return WellRate(
        well=name, slope_au_per_min=b, slope_se_au_per_min=se, intercept_au=intercept,
        r2=float(fits.r2()[row]), window_start_min=float(t[start_read]), window_end_min=float(t[end]),
        n_points=n, flag=None, reason=f"well {name}: {text}{note}{cut_text}", slope_dof=int(fits.dof[row]),
        conversion_pct=100 * conversion, slope_change_pct=nan if blank else 100 * float(shape.change[i]),
        detectable_change_pct=nan if blank else 100 * float(shape.detectable[i]),
        shape=shape_name, slope_kind=kind.value,
    )


def _after_lag(name: str, t: FloatArray, y0: float, stop: int, conversion: float, shape: RateShape, i: int,
               lag: tuple[LagFits, int], what: str, cut_text: str, flagged: Any) -> WellRate:
    """A lag well under ``steady-state``: the hysteretic model's steady-state rate, or flagged if not reached."""
    fits, row = lag
    tau = float(fits.tau_min[row])
    shape_info = {"conversion_pct": 100 * conversion, "slope_change_pct": 100 * float(shape.change[i]),
                  "shape": RateFlag.LAG.value}
    if not bool(fits.reached[row]):
        return flagged(RateFlag.LAG, f"{what}; the lag is too long for a steady state within the read: its time "
                                     f"constant is {tau:.2g} min and the window {t[0]:g}–{t[stop - 1]:g} min lasts less "
                                     f"than {STEADY_STATE_TIME_CONSTANTS:g} of them; read for longer", **shape_info)
    n = int(fits.n[row])
    span = (f"window {t[0]:g}–{t[n - 1]:g} min ({n} reads), {100 * conversion:.1f} % of the substrate converted"
            if np.isfinite(conversion) else f"window {t[0]:g}–{t[n - 1]:g} min ({n} reads)")
    return WellRate(
        well=name, slope_au_per_min=float(fits.rate_au_per_min[row]),
        slope_se_au_per_min=float(np.sqrt(fits.rate_var[row])),
        intercept_au=y0 + float(fits.intercept_au[row] - fits.rate_au_per_min[row] * t[0]), r2=float(fits.r2()[row]),
        window_start_min=float(t[0]), window_end_min=float(t[n - 1]), n_points=n, flag=None,
        reason=(f"well {name}: {span}; {what}: steady-state slope after the lag (hysteretic curve fitted from "
                f"{t[0]:g} min, time constant {tau:.2g} min), as the method says{cut_text}"),
        slope_dof=int(fits.dof[row]), detectable_change_pct=100 * float(shape.detectable[i]),
        slope_kind=SlopeKind.STEADY_STATE.value, **shape_info)
