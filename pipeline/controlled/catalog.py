"""Every version of every specification and method on file, and the one in force on a date (pure).

Several versions of one document may be on file at once: the one in force on a day is the
version with the latest ``effective_from`` on or before that day; a version effective later is
*staged* (on file, not yet used). A lot's specification is the version in force on its assay
date, or on its date of manufacture where the plant says so (``specification_date`` in the
workspace settings); its methods and reference standard lots are those in force on its assay
date, the day the work was done.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from pipeline.controlled.specs import AssayMethod, Specification
from pipeline.vocabulary import SpecificationDate


def _day(value: str | dt.date) -> dt.date:
    return value if isinstance(value, dt.date) else dt.date.fromisoformat(value)


def in_force_on(versions: tuple[Any, ...], on: dt.date) -> Any | None:
    """The version (of documents ordered by ``effective_from``) in force on ``on``, or None before the first."""
    chosen = None
    for version in versions:
        if version.document.effective_from <= on:
            chosen = version
    return chosen


@dataclass(frozen=True)
class Catalog:
    """Every specification and method on file, by product code and method id.

    ``specifications`` and ``methods`` hold the newest version of each (staged or not): for
    listing and for callers that know of one version only. A night chooses by date with
    ``specification_for_lot``, ``method_on`` and ``method_version``; ``*_versions`` hold every
    version, oldest first (absent: the one in ``specifications``/``methods``).
    """

    specifications: Mapping[str, Specification]
    methods: Mapping[str, AssayMethod]
    specification_versions: Mapping[str, tuple[Specification, ...]] = field(default_factory=dict)
    method_versions: Mapping[str, tuple[AssayMethod, ...]] = field(default_factory=dict)
    specification_date: SpecificationDate = SpecificationDate.ASSAY

    @classmethod
    def of_versions(cls, specifications: Mapping[str, tuple[Specification, ...]],
                    methods: Mapping[str, tuple[AssayMethod, ...]],
                    specification_date: SpecificationDate = SpecificationDate.ASSAY) -> Catalog:
        """A catalog from every version of each document (each tuple ordered by effective date)."""
        return cls(specifications={k: v[-1] for k, v in specifications.items()},
                   methods={k: v[-1] for k, v in methods.items()},
                   specification_versions=dict(specifications), method_versions=dict(methods),
                   specification_date=specification_date)

    def all_specifications(self, product_code: str) -> tuple[Specification, ...]:
        if product_code in self.specification_versions:
            return self.specification_versions[product_code]
        return (self.specifications[product_code],) if product_code in self.specifications else ()

    def all_methods(self, method_id: str) -> tuple[AssayMethod, ...]:
        if method_id in self.method_versions:
            return self.method_versions[method_id]
        return (self.methods[method_id],) if method_id in self.methods else ()

    def every_method(self) -> tuple[AssayMethod, ...]:
        """Every version of every method on file."""
        return tuple(m for method_id in sorted(self.methods) for m in self.all_methods(method_id))

    def specification_on(self, product_code: str, on: str | dt.date) -> Specification | None:
        """The version in force on ``on``; None if none is (unknown product, or before its first version)."""
        return in_force_on(self.all_specifications(product_code), _day(on))

    def specification_date_of(self, manufactured_on: str | dt.date, assay_date: str | dt.date) -> dt.date:
        """The lot's date that chooses its specification, by the plant's setting."""
        return _day(manufactured_on if self.specification_date == SpecificationDate.MANUFACTURE else assay_date)

    def specification_for_lot(self, product_code: str, manufactured_on: str | dt.date,
                              assay_date: str | dt.date) -> Specification:
        """The lot's specification: in force on its assay (or manufacture) date.

        A lot dated before the product's first version gets that first version (the lot is then
        held incomplete, see ``not_in_force``); an unknown product raises KeyError.
        """
        versions = self.all_specifications(product_code)
        if not versions:
            raise KeyError(product_code)
        chosen = in_force_on(versions, self.specification_date_of(manufactured_on, assay_date))
        return chosen if chosen is not None else versions[0]

    def not_in_force(self, spec: Specification, manufactured_on: str | dt.date,
                     assay_date: str | dt.date) -> str | None:
        """Why ``spec`` cannot decide the lot (no version in force on the lot's date), or None."""
        day = self.specification_date_of(manufactured_on, assay_date)
        if day >= spec.document.effective_from:
            return None
        which = "made" if self.specification_date == SpecificationDate.MANUFACTURE else "assayed"
        return (f"specification {spec.product_code} v{spec.document.version} is effective from "
                f"{spec.document.effective_from}; the lot was {which} on {day}, before any version was in force")

    def method_on(self, method_id: str, on: str | dt.date) -> AssayMethod | None:
        """The method version in force on ``on``, or None (unknown method, or before its first version)."""
        return in_force_on(self.all_methods(method_id), _day(on))

    def method_version(self, method_id: str, version: str | None) -> AssayMethod | None:
        """One version of a method by its number (None: the newest)."""
        versions = self.all_methods(method_id)
        if version is None:
            return versions[-1] if versions else None
        return next((m for m in versions if m.document.version == version), None)

    def lot_methods(self, spec: Specification, assay_date: str | dt.date) -> dict[str, AssayMethod]:
        """The specification's activity and protein methods in force on the assay date (those on file).

        Before a method's first version, that first version (its plates are then invalid: see
        the night's assembly, which names the method not yet in force).
        """
        out: dict[str, AssayMethod] = {}
        for method_id in (spec.activity_method, spec.protein_method):
            versions = self.all_methods(method_id)
            method = in_force_on(versions, _day(assay_date)) or (versions[0] if versions else None)
            if method is not None:
                out[method_id] = method
        return out

    def staged(self, on: str | dt.date, methods_on: str | dt.date | None = None) -> tuple[Any, ...]:
        """Every specification version taking effect after ``on``, and method version after ``methods_on``
        (default ``on``): on file, not yet in force."""
        day, method_day = _day(on), _day(methods_on if methods_on is not None else on)
        specs = [s for k in sorted(self.specifications) for s in self.all_specifications(k)
                 if s.document.effective_from > day]
        return (*specs, *(m for m in self.every_method() if m.document.effective_from > method_day))

    def staged_notes(self, lot_dates: list[tuple[str, str]]) -> list[str]:
        """A note for each version on file that none of the night's lots (manufactured, assayed) is judged by yet."""
        if not lot_dates:
            return []
        spec_day = max(self.specification_date_of(made, assayed) for made, assayed in lot_dates)
        assay_day = max(_day(assayed) for _, assayed in lot_dates)
        which = "made" if self.specification_date == SpecificationDate.MANUFACTURE else "assayed"
        notes = []
        for document in self.staged(spec_day, assay_day):
            header = document.document
            what = (f"method {header.name}" if hasattr(document, "method_id") else f"specification {header.name}")
            last = assay_day if hasattr(document, "method_id") else spec_day
            verb = "assayed" if hasattr(document, "method_id") else which
            notes.append(f"{what} v{header.version} is on file and takes effect on {header.effective_from}: staged, "
                         f"not used tonight (tonight's lots were {verb} up to {last})")
        return notes
