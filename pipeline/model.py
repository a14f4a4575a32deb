"""Frozen result objects shared by the computation stages, the documents and the store.

Everything here is plain data: no I/O, no orchestration. ``to_dict()`` gives JSON-able
mappings for the decision log, the store and the LIMS results file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, is_dataclass
from typing import Any

RELEASED = "released"
HELD = "held"

# Hold categories, in the order a reviewer should read them (DOMAIN.md §6).
OUT_OF_SPECIFICATION = "out of specification"
INVALID_ASSAY = "invalid assay"
INCOMPLETE = "incomplete"
OUT_OF_TREND = "out of trend"
REVIEW_REQUIRED = "review required"  # an earlier hold or a person's decision stands
HOLD_ORDER = (OUT_OF_SPECIFICATION, INVALID_ASSAY, INCOMPLETE, OUT_OF_TREND, REVIEW_REQUIRED)

# Verdicts of one attribute.
PASS = "pass"
FAIL = "fail"
INVALID = "invalid"
MISSING = "missing"
REPORTED = "reported"  # reported without a limit


_PLAIN = (str, int, bool, type(None))


def _clean(value: Any) -> Any:
    """Turn numpy scalars, tuples, nested result objects and non-finite floats into JSON-able values.

    The common types are tested first by exact type: a night cleans millions of values.
    """
    kind = type(value)
    if kind is float:
        return value if math.isfinite(value) else None
    if kind in _PLAIN:
        return value
    if kind is dict:
        return {str(k): _clean(v) for k, v in value.items()}
    if kind is list or kind is tuple:
        return [_clean(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if is_dataclass(value) and not isinstance(value, type):
        return _clean(vars(value))
    if hasattr(value, "item") and not isinstance(value, str | bytes):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


@dataclass(frozen=True)
class Measurement:
    """A computed quantity with its standard error, or the reasons it cannot be reported.

    ``value`` is None when the data cannot support a number; ``reasons`` then says why.
    ``valid`` is False when a system-suitability criterion touching it failed.
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

    @property
    def relative_se(self) -> float | None:
        if self.value in (None, 0.0) or self.se is None:
            return None
        return abs(self.se / self.value)

    def to_dict(self) -> dict[str, Any]:
        return _clean(vars(self))


@dataclass(frozen=True)
class AttributeVerdict:
    """One specification attribute of one lot: the reported value and its verdict."""

    code: str
    title: str
    unit: str
    value: float | str | None
    reported: str | None
    se: float | None
    limit_text: str
    verdict: str
    reasons: tuple[str, ...] = ()
    method: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return _clean(vars(self))


@dataclass(frozen=True)
class TrendFinding:
    """What the control chart said about one attribute of one lot."""

    attribute: str
    status: str  # "in trend", "out of trend", "not yet established", "not evaluated"
    center: float | None = None
    sigma: float | None = None
    limits_version: int | None = None
    baseline_n: int | None = None
    signals: tuple[str, ...] = ()
    lots_involved: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return _clean(vars(self))


@dataclass(frozen=True)
class Decision:
    """The disposition of one lot, with everything needed to reproduce it."""

    lot_id: str
    product: str
    disposition: str
    hold_categories: tuple[str, ...]
    reasons: tuple[str, ...]
    spec_version: str
    spec_sha256: str
    method_versions: dict[str, str]
    method_sha256: dict[str, str]
    input_files: dict[str, str]  # file name -> SHA-256
    code_version: str
    fingerprint: str  # SHA-256 over inputs, spec and methods: same fingerprint, same decision

    @property
    def label(self) -> str:
        if self.disposition == RELEASED:
            return RELEASED
        return f"held: {', '.join(self.hold_categories)}"

    def to_dict(self) -> dict[str, Any]:
        return _clean(vars(self))
