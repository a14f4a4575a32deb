"""Export layouts: the pandera schemas under ``schemas/`` plus what pandera cannot express.

Each ``schemas/<kind>.yaml`` has two sections: ``pandera`` (a DataFrameSchema that
``pandera.io.pandas_io.from_yaml`` reads: dtypes, nullability, uniqueness, patterns, ranges,
allowed values) and ``lotgate_export`` (the file-name prefix, version, the size, row and
line-length limits, and a hint per column in the analyst's words). The ``lotgate_export`` header is
checked against its declared schema (``LayoutHeader``): no unknown key, no wrong type.

A layout of reads over time (columns ``plate_id``, ``well`` and ``time_s``: a kinetic read) must
cap the reads per well, ``max_reads_per_well``, a whole number from 1 to ``READS_PER_WELL_LIMIT``
(a read every second for the 24 h a read may last); intake quarantines an export whose well has
more (``pipeline.intake.row_checks``), before any fit. Other layouts may not name the field.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandera.pandas as pa
import yaml
from pandera.io.pandas_io import from_yaml
from pydantic import Field

from pipeline.controlled.strict import Strict, Text, checked
from pipeline.errors import SpecificationError

# The largest reads-per-well cap a layout may declare: a read every second for 24 h (86,400 s, the
# longest read a kinetic layout's read times allow). A larger figure is taken for a typing error.
READS_PER_WELL_LIMIT = 86_400
SERIES_COLUMNS = frozenset({"plate_id", "well", "time_s"})  # a layout of reads over time


@dataclass(frozen=True)
class ExportLayout:
    kind: str
    version: str
    title: str
    file_prefix: str
    max_bytes: int
    max_rows: int
    max_line_chars: int
    columns: tuple[str, ...]
    nullable: frozenset[str]
    schema: pa.DataFrameSchema
    sha256: str
    hints: dict[str, str] = field(default_factory=dict)
    max_reads_per_well: int | None = None  # layouts of reads over time only


class LayoutHeader(Strict):
    """The declared schema of a layout's ``lotgate_export`` section (see pipeline.controlled.strict)."""

    kind: Text
    version: Text = Field(description="a version written as text, e.g. '1.1' (quoted)")
    title: Text | None = None
    file_prefix: Text
    max_bytes: int = Field(gt=0)
    max_rows: int = Field(gt=0)
    max_line_chars: int = Field(gt=0)
    max_reads_per_well: int | None = Field(default=None, gt=0, le=READS_PER_WELL_LIMIT,
                                           description="a whole number of reads per well")
    hints: dict[str, Text] = Field(default_factory=dict, description="a mapping of column names to hints")


class LayoutFile(Strict):
    lotgate_export: LayoutHeader
    pandera: dict[str, Any] = Field(description="a pandera DataFrameSchema written as a mapping")


def load_layout(path: Path) -> ExportLayout:
    data = path.read_bytes()
    where = f"schemas/{path.name}"
    try:
        raw = yaml.safe_load(data)
    except yaml.YAMLError as exc:
        raise SpecificationError(f"{where}: not valid YAML ({exc})") from exc
    layout = checked(LayoutFile, raw, where)
    head = layout.lotgate_export
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            schema = from_yaml(yaml.safe_dump(layout.pandera, sort_keys=False))
    except (yaml.YAMLError, KeyError, TypeError, ValueError) as exc:
        raise SpecificationError(f"{where}: the pandera section is not a valid table schema ({exc})") from exc
    unknown = sorted(set(head.hints) - set(schema.columns))
    if unknown:
        raise SpecificationError(f"{where}: 'lotgate_export.hints' names {', '.join(unknown)}, which the pandera "
                                 f"section does not declare; allowed: {', '.join(schema.columns)}")
    series = SERIES_COLUMNS <= set(schema.columns)
    if series and head.max_reads_per_well is None:
        raise SpecificationError(f"{where}: a layout of reads over time must cap the reads per well: the field "
                                 f"'lotgate_export.max_reads_per_well' is missing (a whole number from 1 to "
                                 f"{READS_PER_WELL_LIMIT:,})")
    if not series and head.max_reads_per_well is not None:
        raise SpecificationError(f"{where}: 'lotgate_export.max_reads_per_well' caps reads over time; this layout has "
                                 f"no {', '.join(sorted(SERIES_COLUMNS))} columns to count them by: remove the field")
    return ExportLayout(
        kind=head.kind, version=head.version, title=head.title or head.kind, file_prefix=head.file_prefix,
        max_bytes=head.max_bytes, max_rows=head.max_rows, max_line_chars=head.max_line_chars,
        columns=tuple(schema.columns),
        nullable=frozenset(name for name, col in schema.columns.items() if col.nullable),
        schema=schema, sha256=hashlib.sha256(data).hexdigest(), hints=dict(head.hints),
        max_reads_per_well=head.max_reads_per_well,
    )


def load_layouts(directory: Path) -> dict[str, ExportLayout]:
    """Every layout under ``directory``, by kind: one file per kind, and no two with one file prefix.

    A second layout of a kind (an edited copy left beside the first, say) would silently
    replace the first; it is refused, naming both files, so that a person chooses one.
    """
    layouts: dict[str, ExportLayout] = {}
    files: dict[str, str] = {}  # kind -> the layout file that defines it
    for path in sorted(directory.glob("*.yaml")):
        layout = load_layout(path)
        if layout.kind in layouts:
            raise SpecificationError(f"schemas/{files[layout.kind]} and schemas/{path.name} both describe exports of "
                                     f"kind '{layout.kind}'; one layout per kind: remove or rename one of them")
        for kind, other in layouts.items():
            if other.file_prefix == layout.file_prefix:
                raise SpecificationError(f"schemas/{files[kind]} and schemas/{path.name} both claim the files whose "
                                         f"names start with '{layout.file_prefix}'; each layout needs its own prefix")
        layouts[layout.kind] = layout
        files[layout.kind] = path.name
    if not layouts:
        raise SpecificationError(f"no export layout found under {directory}")
    return layouts


def layout_for(file_name: str, layouts: dict[str, ExportLayout]) -> ExportLayout | None:
    """The layout whose prefix starts the file name (longest prefix wins), or None."""
    matches = [lay for lay in layouts.values() if file_name.startswith(lay.file_prefix)]
    return max(matches, key=lambda lay: len(lay.file_prefix)) if matches else None
