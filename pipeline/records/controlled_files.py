"""Reads the controlled documents under ``specs/`` (adapter: file I/O and SHA-256)."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import yaml

from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import (
    KineticMethod,
    ProteinMethod,
    Specification,
    parse_method,
    parse_specification,
)
from pipeline.errors import SpecificationError

REPO_ROOT = Path(__file__).resolve().parents[2]


def specs_dir() -> Path:
    return Path(os.environ.get("LOTGATE_SPECS_DIR", REPO_ROOT / "specs"))


def schemas_dir() -> Path:
    return Path(os.environ.get("LOTGATE_SCHEMAS_DIR", REPO_ROOT / "schemas"))


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


def load_catalog(root: Path | None = None) -> Catalog:
    """Load ``products/*.yaml`` and ``methods/*.yaml``; check cross references."""
    root = root or specs_dir()
    specifications: dict[str, Specification] = {}
    methods: dict[str, KineticMethod | ProteinMethod] = {}
    for path in sorted((root / "methods").glob("*.yaml")):
        raw, sha = _read_yaml(path)
        method = parse_method(raw, f"specs/methods/{path.name}", sha)
        if method.method_id in methods:
            raise SpecificationError(f"specs/methods/{path.name}: method '{method.method_id}' defined twice")
        methods[method.method_id] = method
    for path in sorted((root / "products").glob("*.yaml")):
        raw, sha = _read_yaml(path)
        spec = parse_specification(raw, f"specs/products/{path.name}", sha)
        if spec.product_code in specifications:
            raise SpecificationError(f"specs/products/{path.name}: product '{spec.product_code}' defined twice")
        for method_id in (spec.activity_method, spec.protein_method):
            if method_id not in methods:
                raise SpecificationError(
                    f"specs/products/{path.name}: refers to method '{method_id}', which is not under specs/methods"
                )
        protein = methods[spec.protein_method]
        if isinstance(protein, ProteinMethod) and protein.kind == "uv280" and not spec.a280_extinction_ml_per_mg_per_cm:
            raise SpecificationError(
                f"specs/products/{path.name}: protein by A280 ({spec.protein_method}) needs the product's "
                "'a280_extinction_ml_per_mg_per_cm' (absorbance of 1 mg/mL in 1 cm)")
        specifications[spec.product_code] = spec
    if not specifications:
        raise SpecificationError(f"no product specification found under {root / 'products'}")
    return Catalog(specifications=specifications, methods=methods)
