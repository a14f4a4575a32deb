"""Every specification and method in force (pure)."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.controlled.specs import AssayMethod, Specification


@dataclass(frozen=True)
class Catalog:
    """Every specification and method in force, keyed by product code and method id."""

    specifications: dict[str, Specification]
    methods: dict[str, AssayMethod]

