"""Every specification and method in force (pure)."""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.controlled.specs import KineticMethod, ProteinMethod, Specification
from pipeline.errors import SpecificationError


@dataclass(frozen=True)
class Catalog:
    """Every specification and method in force, keyed by product code and method id."""

    specifications: dict[str, Specification]
    methods: dict[str, KineticMethod | ProteinMethod]

    def kinetic_method(self, method_id: str) -> KineticMethod:
        method = self.methods.get(method_id)
        if not isinstance(method, KineticMethod):
            raise SpecificationError(f"no kinetic assay method '{method_id}' under specs/methods")
        return method

    def protein_method(self, method_id: str) -> ProteinMethod:
        method = self.methods.get(method_id)
        if not isinstance(method, ProteinMethod):
            raise SpecificationError(f"no protein method '{method_id}' under specs/methods")
        return method
