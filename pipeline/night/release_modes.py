"""Each product's release mode for the night: its specification's own, else the plant's default (glue)."""

from __future__ import annotations

import dataclasses

from pipeline.controlled.catalog import Catalog
from pipeline.errors import SpecificationError
from pipeline.records.workspace import Workspace
from pipeline.vocabulary import ReleaseMode


def with_release_modes(catalog: Catalog, ws: Workspace) -> Catalog:
    """The catalog with every specification's release mode and procedure settled.

    Every version on file is settled. A product released by exception (``automatic``) must name the
    plant's procedure that allows it (in its specification or the workspace's ``release.procedure``); otherwise the night is
    refused before any file moves.
    """
    def settle(spec):
        mode = spec.release_mode or ws.release_mode
        procedure = spec.release_procedure or ws.release_procedure
        if mode == ReleaseMode.AUTOMATIC and not procedure:
            raise SpecificationError(
                f"specification {spec.product_code} version {spec.document.version}: release mode 'automatic' needs "
                "the plant's procedure allowing release by exception ('release_procedure' in the specification, or "
                "'release: {procedure: ...}' in workspace.yaml)")
        return dataclasses.replace(spec, release_mode=mode, release_procedure=procedure)

    return dataclasses.replace(
        catalog, specifications={code: settle(spec) for code, spec in catalog.specifications.items()},
        specification_versions={code: tuple(settle(spec) for spec in versions)
                                for code, versions in catalog.specification_versions.items()})
