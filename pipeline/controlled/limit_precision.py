"""A specification limit must be written no finer than the attribute reports its results (pure).

A result is rounded to the attribute's ``digits`` decimals (or, for a ``scientific`` attribute, to
``SCIENTIFIC_FIGURES`` significant figures) before it is compared with a limit. A limit written
more finely than that (6.45 for a result reported to one decimal) could never be met or missed
as written: the reported 6.5 would look inside it while the comparison said otherwise. Such a
limit is refused when the specification is loaded.
"""

from __future__ import annotations

import math
from decimal import Decimal

from pipeline.errors import SpecificationError

SCIENTIFIC_FIGURES = 3  # significant figures of a scientific attribute's reported result


def limit_decimal(limit: float) -> Decimal:
    """The limit as written: ``repr`` gives the shortest decimal that reads back as the same float."""
    return Decimal(repr(float(limit)))


def written_limit(limit: float) -> str:
    """The limit as a person wrote it: 12345.0 → '12345', 6.50 → '6.5'."""
    return f"{limit_decimal(limit).normalize():f}"


def decimals_of(limit: float) -> int:
    """Decimals the limit needs: 6.5 → 1, 6.50 → 1, 800 → 0, 1.25e-3 → 5."""
    exponent = limit_decimal(limit).normalize().as_tuple().exponent
    assert isinstance(exponent, int)
    return max(0, -exponent)


def significant_figures_of(limit: float) -> int:
    """Significant figures the limit needs: 12300 → 3, 1.25e4 → 3, 0.0005 → 1 (0 → 1)."""
    if limit == 0:
        return 1
    return len(limit_decimal(limit).normalize().as_tuple().digits)


def check_limit_precision(where: str, code: str, side: str, limit: float | None, digits: int,
                          scientific: bool) -> None:
    """Raise a SpecificationError when ``limit`` is written more finely than results are reported."""
    if limit is None:
        return
    if not math.isfinite(limit):
        raise SpecificationError(f"{where}, attribute '{code}': the {side} limit must be a finite number, "
                                 f"found {limit!r}")
    if scientific:
        figures = significant_figures_of(limit)
        if figures > SCIENTIFIC_FIGURES:
            raise SpecificationError(
                f"{where}, attribute '{code}': the {side} limit {written_limit(limit)} has {figures} significant "
                f"figures, but results are reported to {SCIENTIFIC_FIGURES}; write the limit with at most "
                f"{SCIENTIFIC_FIGURES}")
        return
    needed = decimals_of(limit)
    if needed > digits:
        raise SpecificationError(
            f"{where}, attribute '{code}': the {side} limit {written_limit(limit)} has {needed} decimal"
            f"{'s' if needed != 1 else ''}, but results are reported to {digits}; write the limit with at most "
            f"{digits} decimal{'s' if digits != 1 else ''} or raise 'digits'")
