"""Packaging beyond pyproject.toml: the shipped controlled folders travel in the wheel.

The top-level ``specs/`` and ``schemas/`` folders become package data under
``pipeline/shipped/`` (``pipeline.records.controlled_files.shipped_folders`` finds them there in
an installed package). pyproject.toml cannot map extra folders while it also discovers the
packages, so the package list is made here.
"""

from setuptools import find_packages, setup

SHIPPED = {
    "pipeline.shipped.specs.products": "specs/products",
    "pipeline.shipped.specs.methods": "specs/methods",
    "pipeline.shipped.schemas": "schemas",
}

setup(packages=[*find_packages(include=["pipeline*", "flows*"]), *SHIPPED], package_dir=SHIPPED)
