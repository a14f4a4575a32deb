"""Whether Km may be reported, and the turnover number kcat and efficiency kcat/Km."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import ArrayLike

from pipeline.errors import CalculationError
from pipeline.plain_data import to_plain
from pipeline.science.kinetic_data import checked_vector


@dataclass(frozen=True)
class KmQuality:
    """Whether a fitted Km may be reported as a result."""

    well_determined: bool
    reason: str
    km_relative_se: float
    substrate_min: float
    substrate_max: float

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping."""
        return dict(to_plain(self))


@dataclass(frozen=True)
class Turnover:
    """Turnover number per active site and catalytic efficiency, with standard errors."""

    kcat_per_s: float
    kcat_se_per_s: float
    kcat_over_km_per_m_per_s: float
    kcat_over_km_se_per_m_per_s: float

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able mapping."""
        return dict(to_plain(self))


class _HasKm(Protocol):
    km: float
    km_se: float
    converged: bool



def km_determination(fit: _HasKm, substrate: ArrayLike, max_relative_se: float) -> KmQuality:
    """Judge whether Km may be reported.

    Well determined only when the fit converged, min S <= Km <= max S over the tested
    substrate levels, and se(Km)/Km <= ``max_relative_se``; otherwise "poorly determined"
    with every failing condition named.
    """
    s = checked_vector(substrate, "substrate concentration")
    if s.size == 0:
        raise CalculationError("substrate concentration: at least one tested level is needed")
    if not (np.isfinite(max_relative_se) and max_relative_se > 0):
        raise CalculationError(
            f"the limit on the relative SE of Km must be a positive number, received {max_relative_se!r}"
        )
    lo, hi = float(s.min()), float(s.max())
    km, km_se = float(fit.km), float(fit.km_se)
    rel = km_se / km if (np.isfinite(km) and km > 0 and np.isfinite(km_se)) else float("nan")
    problems = []
    if not fit.converged:
        problems.append("the fit did not converge")
    if not np.isfinite(km):
        problems.append("Km is not a finite number")
    elif km < lo:
        problems.append(f"Km {km:.4g} lies below the lowest tested substrate {lo:.4g}")
    elif km > hi:
        problems.append(f"Km {km:.4g} lies above the highest tested substrate {hi:.4g}")
    if not np.isfinite(rel):
        problems.append("the standard error of Km is not available")
    elif rel > max_relative_se:
        problems.append(f"its relative SE {100 * rel:.3g} % exceeds {100 * max_relative_se:.3g} %")
    if problems:
        return KmQuality(False, "poorly determined: " + "; ".join(problems), rel, lo, hi)
    reason = (
        f"well determined: Km {km:.4g} lies within the tested substrate {lo:.4g}-{hi:.4g} "
        f"and its relative SE {100 * rel:.3g} % is within {100 * max_relative_se:.3g} %"
    )
    return KmQuality(True, reason, rel, lo, hi)


def turnover(
    vmax_u_per_mg: float,
    vmax_se_u_per_mg: float,
    km_mm: float,
    km_se_mm: float,
    molecular_weight_g_per_mol: float,
    cov_vmax_km: float = 0.0,
) -> Turnover:
    """Turnover number and catalytic efficiency per active site.

    kcat [1/s] = Vmax [umol/min/mg] * MW [g/mol] / 60 / 1000;
    kcat/Km [1/(M s)] = kcat / (Km [mM] / 1000).
    First-order propagation (MW exact): se(kcat) = kcat * se(Vmax)/Vmax;
    (se(kcat/Km)/(kcat/Km))^2 = (se(Vmax)/Vmax)^2 + (se(Km)/Km)^2 - 2 cov(Vmax, Km)/(Vmax Km),
    with ``cov_vmax_km`` in U/mg * mM.
    """
    values = {
        "Vmax (U/mg)": vmax_u_per_mg,
        "SE of Vmax (U/mg)": vmax_se_u_per_mg,
        "Km (mM)": km_mm,
        "SE of Km (mM)": km_se_mm,
        "molecular weight (g/mol)": molecular_weight_g_per_mol,
        "covariance of Vmax and Km": cov_vmax_km,
    }
    for what, value in values.items():
        if not np.isfinite(value):
            raise CalculationError(f"{what} must be a finite number, received {value!r}")
    for what in ("Vmax (U/mg)", "Km (mM)", "molecular weight (g/mol)"):
        if values[what] <= 0:
            raise CalculationError(f"{what} must be positive, received {values[what]!r}")
    for what in ("SE of Vmax (U/mg)", "SE of Km (mM)"):
        if values[what] < 0:
            raise CalculationError(f"{what} must not be negative, received {values[what]!r}")
    kcat = vmax_u_per_mg * molecular_weight_g_per_mol / 60.0 / 1000.0
    rel_v = vmax_se_u_per_mg / vmax_u_per_mg
    rel_k = km_se_mm / km_mm
    rel2 = rel_v**2 + rel_k**2 - 2.0 * cov_vmax_km / (vmax_u_per_mg * km_mm)
    if rel2 < 0:
        raise CalculationError(
            f"the covariance of Vmax and Km ({cov_vmax_km!r}) is larger than their standard "
            "errors allow (|correlation| > 1)"
        )
    efficiency = kcat / (km_mm / 1000.0)
    return Turnover(
        kcat_per_s=float(kcat),
        kcat_se_per_s=float(kcat * rel_v),
        kcat_over_km_per_m_per_s=float(efficiency),
        kcat_over_km_se_per_m_per_s=float(efficiency * np.sqrt(rel2)),
    )
