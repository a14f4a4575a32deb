"""Process capability (Cp, Cpk, Pp, Ppk) of released lots, with confidence intervals (pure).

Cpk = min(USL − μ̂, μ̂ − LSL) / (3σ̂), with σ̂ the within (short-term) sigma MR̄/d₂ of an I-MR
chart; Ppk the same with the overall sample standard deviation s (n − 1). Cp = (USL − LSL)/(6σ̂)
and Pp likewise, for two-sided specifications only. With one limit only, that side's term.

Intervals (two-sided, ``confidence`` default 95 %):

* Cpk and Ppk: Bissell's normal approximation (A. F. Bissell, "How reliable is your capability
  index?", Applied Statistics 39(3), 1990, 331–340; from memory),
      SE(Ĉpk) ≈ √( 1/(9n) + Ĉpk² / (2(n − 1)) ),   Ĉpk ± z₁₋α/₂ · SE.
  It assumes normal data and σ̂ from the sample SD (n − 1 degrees of freedom): so for Ppk. For
  Cpk, σ̂ = MR̄/d₂ carries fewer: about ν = 0.62·(n − 1) (effective degrees of freedom of the
  average moving range of n individual values, Wheeler & Chambers, *Understanding Statistical
  Process Control*; from memory), which replaces n − 1 in the second term. In simulation
  (tests/test_capability.py, known truth) Bissell with n − 1 covered a Cpk from MR̄ only ~89 % of
  the time, with ν 94–96 %.
* Cp and Pp: the chi-square interval (for Cp with ν degrees of freedom in place of n − 1) (Chou, Owen & Borrego, "Lower confidence limits on process
  capability indices", J. Quality Technology 22(3), 1990; Montgomery, Introduction to Statistical
  Quality Control, the chapter on process capability; from memory),
      Ĉp · √(χ²_{α/2, n−1} / (n − 1))  ≤  Cp  ≤  Ĉp · √(χ²_{1−α/2, n−1} / (n − 1)).

A capability estimate from fewer than ``MIN_CAPABILITY_N`` = 30 lots carries a warning: at
n = 30 and Ppk 1.33 Bissell's 95 % interval is still about ±0.36 wide (Cpk ±0.45), below that it widens
quickly, and the normal approximation itself is stated for moderate to large n (Bissell 1990;
30 is the common rule of thumb for a capability study of individual values, common practice).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from pipeline.errors import CalculationError, SpecificationError

D2_N2 = 1.128  # d₂ for moving ranges of two (ASTM MNL 7 factor tables; see control_charts)
MIN_CAPABILITY_N = 30
MR_DOF_FACTOR = 0.62  # ν ≈ 0.62·(n − 1) for the average moving range (Wheeler & Chambers; from memory)


@dataclass(frozen=True)
class Interval:
    low: float
    high: float

    def to_dict(self) -> dict[str, float]:
        return asdict(self)


@dataclass(frozen=True)
class Capability:
    """Process capability of one attribute against its specification limits, with intervals."""

    cpk: float
    ppk: float
    mean: float
    n: int
    sigma_within: float
    sigma_overall: float
    lsl: float | None
    usl: float | None
    cpk_interval: Interval | None = None
    ppk_interval: Interval | None = None
    cp: float | None = None  # two-sided specifications only
    pp: float | None = None
    cp_interval: Interval | None = None
    pp_interval: Interval | None = None
    confidence: float = 0.95
    warning: str | None = None  # e.g. fewer lots than MIN_CAPABILITY_N

    def to_dict(self) -> dict[str, object]:
        return asdict(self)


def moving_range_dof(n: int) -> float:
    """Effective degrees of freedom of σ̂ = MR̄/d₂ from n individual values: ≈ 0.62·(n − 1)."""
    return MR_DOF_FACTOR * (n - 1)


def bissell_interval(index: float, n: int, confidence: float = 0.95, dof: float | None = None) -> Interval:
    """Ĉpk ± z·√(1/(9n) + Ĉpk²/(2ν)), ν = n − 1 unless given (Bissell 1990, normal approximation)."""
    if n < 2:
        raise CalculationError(f"a capability interval needs at least 2 values; received {n}")
    z = float(stats.norm.ppf(0.5 + confidence / 2))
    nu = float(n - 1 if dof is None else dof)
    se = math.sqrt(1.0 / (9.0 * n) + index * index / (2.0 * nu))
    return Interval(index - z * se, index + z * se)


def chi_square_interval(index: float, n: int, confidence: float = 0.95, dof: float | None = None) -> Interval:
    """Ĉp·√(χ²_{α/2,ν}/ν) to Ĉp·√(χ²_{1−α/2,ν}/ν), ν = n − 1 unless given (Chou, Owen & Borrego 1990)."""
    if n < 2:
        raise CalculationError(f"a capability interval needs at least 2 values; received {n}")
    alpha, dof = 1.0 - confidence, float(n - 1 if dof is None else dof)
    return Interval(index * math.sqrt(float(stats.chi2.ppf(alpha / 2, dof)) / dof),
                    index * math.sqrt(float(stats.chi2.ppf(1 - alpha / 2, dof)) / dof))


def _series(values: ArrayLike) -> np.ndarray:
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1:
        raise CalculationError(f"capability data: expected one value per lot, received shape {x.shape}")
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        raise CalculationError(f"capability data: {bad.size} of {x.size} values are missing or not finite "
                               f"(first at point {int(bad[0])}); every value must be a finite number")
    return x


def capability(values: ArrayLike, lsl: float | None = None, usl: float | None = None,
               sigma_within: float | None = None, confidence: float = 0.95) -> Capability:
    """Cpk, Ppk (and Cp, Pp when two-sided) of a series of lot values, each with its interval."""
    if lsl is None and usl is None:
        raise CalculationError("capability needs at least one specification limit (lower or upper); none was given")
    for name, lim in (("lower", lsl), ("upper", usl)):
        if lim is not None and not np.isfinite(lim):
            raise SpecificationError(f"the {name} specification limit must be finite, received {lim!r}")
    if lsl is not None and usl is not None and not lsl < usl:
        raise SpecificationError(f"the lower specification limit ({lsl}) must be below the upper one ({usl})")
    if not 0 < confidence < 1:
        raise CalculationError(f"the confidence must lie between 0 and 1, received {confidence!r}")
    x = _series(values)
    if x.size < 2:
        raise CalculationError(f"capability needs at least 2 values; received {x.size}")
    n = int(x.size)
    mean = float(np.mean(x))
    sigma_overall = float(np.std(x, ddof=1))
    if sigma_overall == 0.0:
        raise CalculationError(f"all {n} values are identical, so capability cannot be computed")
    if sigma_within is None:
        sigma_within = float(np.mean(np.abs(np.diff(x)))) / D2_N2
    if not (np.isfinite(sigma_within) and sigma_within > 0):
        raise CalculationError("the short-term sigma (within) must be a finite number above 0, "
                               f"received {sigma_within!r}")
    nearest = min(d for d in (None if usl is None else usl - mean, None if lsl is None else mean - lsl)
                  if d is not None)
    cpk, ppk = nearest / (3.0 * sigma_within), nearest / (3.0 * sigma_overall)
    cp = pp = None
    if lsl is not None and usl is not None:
        cp, pp = (usl - lsl) / (6.0 * sigma_within), (usl - lsl) / (6.0 * sigma_overall)
    warning = None
    if n < MIN_CAPABILITY_N:
        warning = (f"only {n} released lots (fewer than {MIN_CAPABILITY_N}): the estimate is uncertain; "
                   "read the interval, not the point value")
    return Capability(
        cpk=cpk, ppk=ppk, mean=mean, n=n, sigma_within=float(sigma_within), sigma_overall=sigma_overall,
        lsl=None if lsl is None else float(lsl), usl=None if usl is None else float(usl),
        cpk_interval=bissell_interval(cpk, n, confidence, moving_range_dof(n)),
        ppk_interval=bissell_interval(ppk, n, confidence),
        cp=cp, pp=pp, cp_interval=None if cp is None else chi_square_interval(cp, n, confidence, moving_range_dof(n)),
        pp_interval=None if pp is None else chi_square_interval(pp, n, confidence),
        confidence=confidence, warning=warning)
