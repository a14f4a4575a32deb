"""Enzyme units and the Beer–Lambert conversion from an absorbance slope to activity.

1 U converts 1 µmol of substrate per minute; the SI unit katal is 1 mol/s, so
1 U = 1/60 µkat = 16.67 nkat. With ε in mM⁻¹·cm⁻¹ and the path length in cm,
(ΔA/min) / (ε·l) is in mM/min, which is µmol·mL⁻¹·min⁻¹, i.e. U per mL of reaction.

Every function accepts scalars or numpy arrays (broadcast together) and returns a float for
scalar input and an ndarray otherwise. A non-finite rate passes through as NaN (a flagged
well); a non-positive or non-finite method parameter raises CalculationError.
"""

from __future__ import annotations

from typing import TypeAlias

import numpy as np
import numpy.typing as npt

from pipeline.errors import CalculationError

ArrayLike: TypeAlias = float | int | npt.ArrayLike
FloatOrArray: TypeAlias = float | npt.NDArray[np.float64]

NKAT_PER_U: float = 1000.0 / 60.0
"""Nanokatal per enzyme unit: 1 U = 1 µmol/min = 10⁻⁶/60 mol/s = 16.67 nkat."""


def as_result(value: npt.NDArray[np.float64]) -> FloatOrArray:
    """A float for a 0-d result, the array otherwise."""
    return float(value) if np.ndim(value) == 0 else value


def require_positive(name: str, value: ArrayLike, unit: str) -> npt.NDArray[np.float64]:
    """Return ``value`` as a float array; raise CalculationError unless every entry is finite and > 0.

    ``unit`` is appended to the parameter's name in the message, e.g. " (cm)".
    """
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise CalculationError(
            f"{name} must be a positive number{unit}; received {value!r}"
        ) from exc
    bad = ~np.isfinite(array) | (array <= 0)
    if np.any(bad):
        shown = array if array.ndim == 0 else array[bad].ravel()[0]
        raise CalculationError(
            f"{name} must be a positive, finite number{unit}; received {float(shown)!r}"
        )
    return array


def u_to_nkat(activity_u: ArrayLike) -> FloatOrArray:
    """Convert enzyme units to nanokatal: nkat = U · 1000/60."""
    return as_result(np.asarray(activity_u, dtype=float) * NKAT_PER_U)


def nkat_to_u(activity_nkat: ArrayLike) -> FloatOrArray:
    """Convert nanokatal to enzyme units: U = nkat · 60/1000."""
    return as_result(np.asarray(activity_nkat, dtype=float) / NKAT_PER_U)


def rate_mm_per_min(
    rate_au_per_min: ArrayLike,
    epsilon_per_mm_per_cm: ArrayLike,
    path_length_cm: ArrayLike,
) -> FloatOrArray:
    """Concentration change from an absorbance slope (Beer–Lambert).

    rate [mM/min] = (ΔA/min) / (ε [mM⁻¹·cm⁻¹] · l [cm])
    """
    epsilon = require_positive(
        "extinction coefficient ε", epsilon_per_mm_per_cm, " (per mM per cm)"
    )
    path = require_positive("path length", path_length_cm, " (cm)")
    rate = np.asarray(rate_au_per_min, dtype=float)
    return as_result(rate / (epsilon * path))


def activity_u_per_ml(
    rate_au_per_min: ArrayLike,
    epsilon_per_mm_per_cm: ArrayLike,
    path_length_cm: ArrayLike,
    reaction_volume_ml: ArrayLike,
    sample_volume_ml: ArrayLike,
    dilution_factor: ArrayLike,
) -> FloatOrArray:
    """Volumetric activity of the undiluted sample.

    activity [U/mL] = (ΔA/min) / (ε · l) · V_reaction / V_sample · DF

    with ε in mM⁻¹·cm⁻¹, l in cm and both volumes in mL; (ΔA/min)/(ε·l) is µmol·mL⁻¹·min⁻¹
    of reaction mixture, V_reaction/V_sample refers it to the sample added, and DF to the
    sample before dilution.
    """
    reaction = require_positive("reaction volume", reaction_volume_ml, " (mL)")
    sample = require_positive("sample volume", sample_volume_ml, " (mL)")
    dilution = require_positive("dilution factor", dilution_factor, "")
    per_ml_reaction = np.asarray(
        rate_mm_per_min(rate_au_per_min, epsilon_per_mm_per_cm, path_length_cm), dtype=float
    )
    return as_result(per_ml_reaction * reaction / sample * dilution)
