"""Reads the controlled documents on file, every version (adapter: file I/O and SHA-256).

Three folders hold them: product specifications, assay methods and export layouts. Each folder
is chosen on its own, first match wins:

1. the workspace's setting (``controlled:`` in ``DIR/workspace.yaml``, see pipeline.records.workspace);
2. the environment: ``LOTGATE_SPECS_DIR`` (a folder holding ``products/`` and ``methods/``)
   and ``LOTGATE_SCHEMAS_DIR`` (the export layouts);
3. the folders shipped with lotgate (``shipped_folders``).
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import yaml

from pipeline.assay.method_kinds import parse_method
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import AssayMethod, ProteinMethod, Specification, parse_specification
from pipeline.controlled.versions import ordered_versions
from pipeline.errors import SpecificationError
from pipeline.intake.layouts import ExportLayout, load_layouts
from pipeline.records.workspace import Workspace
from pipeline.vocabulary import SpecificationDate

SPECS_ENV, SCHEMAS_ENV = "LOTGATE_SPECS_DIR", "LOTGATE_SCHEMAS_DIR"


@dataclass(frozen=True)
class ControlledFolders:
    """Where the controlled documents in force are read from: one YAML file per document."""

    specifications: Path  # product specifications
    methods: Path  # assay methods
    layouts: Path  # export layouts


def _source_checkout() -> Path | None:
    """The repository this module runs from (pyproject.toml, specs/, schemas/ beside the package), if any."""
    root = Path(__file__).resolve().parents[2]
    wanted = (root / "pyproject.toml", root / "specs", root / "schemas")
    return root if wanted[0].is_file() and wanted[1].is_dir() and wanted[2].is_dir() else None


def shipped_folders() -> ControlledFolders:
    """The specifications, methods and export layouts shipped with lotgate.

    In a source checkout (editable install, or the repository on sys.path): its top-level
    ``specs/`` and ``schemas/``. In an installed package: their copies, package data under
    ``pipeline/shipped/``.
    """
    root = _source_checkout()
    if root is not None:
        specs, schemas = root / "specs", root / "schemas"
    else:
        shipped = resources.files("pipeline") / "shipped"
        if not isinstance(shipped, Path):
            raise SpecificationError(
                f"lotgate's shipped specifications are inside {shipped} and cannot be read as "
                "folders; install lotgate unpacked (pip install), or name the folders in workspace.yaml")
        specs, schemas = shipped / "specs", shipped / "schemas"
    return ControlledFolders(specifications=specs / "products", methods=specs / "methods", layouts=schemas)


def controlled_folders(ws: Workspace | None = None) -> ControlledFolders:
    """Each folder from the workspace's setting, else the environment, else the shipped one."""
    shipped = shipped_folders()
    specs_env, schemas_env = os.environ.get(SPECS_ENV), os.environ.get(SCHEMAS_ENV)
    by_env = ControlledFolders(
        specifications=Path(specs_env) / "products" if specs_env else shipped.specifications,
        methods=Path(specs_env) / "methods" if specs_env else shipped.methods,
        layouts=Path(schemas_env) if schemas_env else shipped.layouts,
    )
    plant = dict(ws.controlled) if ws is not None else {}
    return ControlledFolders(
        specifications=plant.get("specifications", by_env.specifications),
        methods=plant.get("methods", by_env.methods),
        layouts=plant.get("layouts", by_env.layouts),
    )


def open_controlled_documents(ws: Workspace | None = None) -> tuple[Catalog, dict[str, ExportLayout]]:
    """The catalog (specifications and methods) and the export layouts a night in ``ws`` uses.

    Without a workspace: the environment's folders, else the shipped ones.
    """
    folders = controlled_folders(ws)
    basis = ws.specification_date if ws is not None else SpecificationDate.ASSAY
    return load_catalog(folders, basis), load_layouts(folders.layouts)


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _read_yaml(path: Path) -> tuple[dict, str]:
    data = path.read_bytes()
    try:
        raw = yaml.safe_load(data)
    except yaml.YAMLError as exc:
        raise SpecificationError(f"{path.name}: not valid YAML ({exc})") from exc
    if not isinstance(raw, dict):
        raise SpecificationError(f"{path.name}: expected a mapping at the top level")
    return raw, hashlib.sha256(data).hexdigest()


def _load_methods(folder: Path) -> dict[str, tuple[AssayMethod, ...]]:
    """Every version of every method under ``folder``, oldest first (ambiguous versions refused)."""
    found = []
    for path in sorted(folder.glob("*.yaml")):
        raw, sha = _read_yaml(path)
        method = parse_method(raw, str(path), sha)
        found.append((str(path), method.method_id, method))
    return ordered_versions(found, "method")


def _check_references(path: str, spec: Specification, methods: dict[str, tuple[AssayMethod, ...]],
                      folder: Path) -> None:
    for method_id in (spec.activity_method, spec.protein_method):
        if method_id not in methods:
            raise SpecificationError(f"{path}: refers to method '{method_id}', which is not under {folder}")
    for protein in methods[spec.protein_method]:
        if isinstance(protein, ProteinMethod) and protein.kind == "uv280" and not spec.a280_extinction_ml_per_mg_per_cm:
            raise SpecificationError(
                f"{path}: protein by A280 ({spec.protein_method}) needs the product's "
                "'a280_extinction_ml_per_mg_per_cm' (absorbance of 1 mg/mL in 1 cm)")


def load_catalog(folders: ControlledFolders | None = None,
                 specification_date: SpecificationDate = SpecificationDate.ASSAY) -> Catalog:
    """Load every version of every product specification and method; check the cross references.

    A version effective in the future is loaded too (staged); the night uses the version in force
    on each lot's date (pipeline.controlled.catalog).
    """
    folders = folders or controlled_folders()
    methods = _load_methods(folders.methods)
    found = []
    for path in sorted(folders.specifications.glob("*.yaml")):
        raw, sha = _read_yaml(path)
        spec = parse_specification(raw, str(path), sha)
        _check_references(str(path), spec, methods, folders.methods)
        found.append((str(path), spec.product_code, spec))
    specifications = ordered_versions(found, "product")
    if not specifications:
        raise SpecificationError(f"no product specification found under {folders.specifications}")
    return Catalog.of_versions(specifications, methods, specification_date)
