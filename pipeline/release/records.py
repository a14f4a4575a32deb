"""Frozen records of a lot's verdicts, trend findings and decision."""

from __future__ import annotations

from dataclasses import dataclass, field, fields
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
        if self.disposition in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE):
            return self.disposition
        return f"held: {', '.join(self.hold_categories)}"

    def to_dict(self) -> dict[str, Any]:
        return to_plain(vars(self))


@dataclass(frozen=True)
class RecordedResult:
    """One result as a decision record keeps it (the value unrounded, the reported text rounded)."""

    code: str
    value: float | str | None
    reported: str | None
    unit: str
    verdict: str


@dataclass(frozen=True)
class DocumentFile:
    """A document written for a decision: its file name and SHA-256."""

    file: str
    sha256: str


@dataclass(frozen=True)
class CertificateFile:
    """A signed certificate: the file, who signed it, when and with what meaning."""

    file: str
    sha256: str
    signer: str
    signed_at_utc: str
    meaning: str
    signer_certificate_sha256: str | None = None


@dataclass(frozen=True)
class EarlierDecision:
    """The revision a person's decision replaces, as it stood."""

    revision: int
    label: str | None
    reasons: tuple[str, ...]


_ABSENT_WHEN_NONE = ("earlier_decision", "decided_by", "meaning", "person_signature")


@dataclass(frozen=True)
class DecisionRecord:
    """A lot's decision as stored and logged: the decision, its results, trend and documents.

    ``to_json`` is the record's one conversion to JSON-able data and ``from_json`` reads it back;
    the fields a person's decision adds (earlier decision, decided by, meaning, signature) are left
    out of a nightly record rather than written as null.
    """

    lot_id: str
    product: str
    disposition: str
    hold_categories: tuple[str, ...]
    reasons: tuple[str, ...]
    spec_version: str
    spec_sha256: str
    fingerprint: str
    label: str
    revision: int = 1
    method_versions: dict[str, str] = field(default_factory=dict)
    method_sha256: dict[str, str] = field(default_factory=dict)
    input_files: dict[str, str] = field(default_factory=dict)
    code_version: str = ""
    night_id: int | None = None
    decided_at_utc: str = ""
    results: tuple[RecordedResult, ...] = ()
    trend: tuple[TrendFinding, ...] = ()
    certificate: CertificateFile | None = None
    report: DocumentFile | None = None
    earlier_decision: EarlierDecision | None = None
    decided_by: str | None = None
    meaning: str | None = None
    person_signature: dict[str, Any] | None = None

    @classmethod
    def of(cls, decision: Decision, verdicts: tuple[AttributeVerdict, ...], **rest: Any) -> DecisionRecord:
        """The record of a nightly decision: the decision, its results, and ``rest`` (revision, documents…)."""
        results = tuple(RecordedResult(v.code, v.value, v.reported, v.unit, v.verdict) for v in verdicts)
        return cls(**vars(decision), label=decision.label, results=results, **rest)

    def to_json(self) -> dict[str, Any]:
        plain = to_plain(self)
        plain["trend"] = [finding.to_dict() for finding in self.trend]  # without the in-memory rule numbers
        for key in _ABSENT_WHEN_NONE:
            if plain[key] is None:
                del plain[key]
        if plain["certificate"] is not None and plain["certificate"]["signer_certificate_sha256"] is None:
            del plain["certificate"]["signer_certificate_sha256"]
        return plain

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> DecisionRecord:
        known = {f.name for f in fields(cls)}
        values = {k: v for k, v in data.items() if k in known}
        for key in ("hold_categories", "reasons"):
            values[key] = tuple(values.get(key) or ())
        values["results"] = tuple(RecordedResult(r["code"], r.get("value"), r.get("reported"), r.get("unit") or "",
                                                 r["verdict"]) for r in values.get("results") or ())
        values["trend"] = tuple(TrendFinding(**{**t, "signals": tuple(t.get("signals") or ()),
                                                "lots_involved": tuple(t.get("lots_involved") or ())})
                                for t in values.get("trend") or ())
        if values.get("certificate") is not None:
            values["certificate"] = CertificateFile(**values["certificate"])
        if values.get("report") is not None:
            values["report"] = DocumentFile(**values["report"])
        if values.get("earlier_decision") is not None:
            earlier = values["earlier_decision"]
            values["earlier_decision"] = EarlierDecision(earlier["revision"], earlier.get("label"),
                                                         tuple(earlier.get("reasons") or ()))
        values.setdefault("label", data.get("label") or values.get("disposition", ""))
        return cls(**values)
