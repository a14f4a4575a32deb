"""Frozen records of a lot's verdicts, trend findings and decision."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pipeline.plain_data import to_plain
from pipeline.vocabulary import Disposition, HoldCategory, NelsonRule, TrendStatus, Verdict


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
    verdict: Verdict
    reasons: tuple[str, ...] = ()
    method: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))


@dataclass(frozen=True)
class TrendFinding:
    """What the control chart said about one attribute of one lot."""

    attribute: str
    status: TrendStatus
    center: float | None = None
    sigma: float | None = None
    limits_version: int | None = None
    baseline_n: int | None = None
    signals: tuple[str, ...] = ()  # one reason per signal, for a person
    lots_involved: tuple[str, ...] = ()
    rules: tuple[NelsonRule, ...] = ()  # the rule of each signal; not stored (records keep their format)

    def to_dict(self) -> dict[str, Any]:
        return to_plain({k: v for k, v in vars(self).items() if k != "rules"})


@dataclass(frozen=True)
class Decision:
    """The disposition of one lot, with everything needed to reproduce it."""

    lot_id: str
    product: str
    disposition: Disposition
    hold_categories: tuple[HoldCategory, ...]
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
        if self.disposition == Disposition.RELEASED:
            return Disposition.RELEASED
        return f"held: {', '.join(self.hold_categories)}"

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))
