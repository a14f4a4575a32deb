"""A computed quantity with its standard error and interval, or the reasons it cannot be reported."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from pipeline.plain_data import to_plain


@dataclass(frozen=True)
class Measurement:
    """A computed quantity with its standard error, or the reasons it cannot be reported.

    ``value`` is None when the data cannot support a number; ``reasons`` then says why.
    ``valid`` is False when a system-suitability criterion touching it failed.
    ``ci95`` is value ± t₀.₉₇₅(dof)·se where both are known.
    """

    name: str
    unit: str
    value: float | None
    se: float | None = None
    ci95: tuple[float, float] | None = None
    n: int = 0
    valid: bool = True
    reasons: tuple[str, ...] = ()
    detail: dict[str, Any] = field(default_factory=dict)
    dof: float | None = None  # degrees of freedom of ``se`` (effective, Welch–Satterthwaite, when combined)

    @property
    def relative_se(self) -> float | None:
        if self.value in (None, 0.0) or self.se is None:
            return None
        return abs(self.se / self.value)

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))
