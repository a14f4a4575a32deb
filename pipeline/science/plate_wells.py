"""Well names of 96- and 384-well plates: "A01" to "H12" or "P24", row-major indices."""

from __future__ import annotations

import re
from collections.abc import Mapping

from pipeline.errors import InputError

PLATE_FORMATS: Mapping[int, tuple[int, int]] = {96: (8, 12), 384: (16, 24)}
_WELL_PATTERN = re.compile(r"^\s*([A-Za-z])\s*0*(\d{1,3})\s*$")


def _plate_shape(plate_format: int) -> tuple[int, int]:
    if plate_format not in PLATE_FORMATS:
        raise InputError(
            f"plate format {plate_format!r} is not supported; allowed: 96 or 384 wells"
        )
    return PLATE_FORMATS[plate_format]


def parse_well(well: str, plate_format: int = 96) -> tuple[int, int]:
    """Return the zero-based (row, column) of a well name such as "A01", "a1" or "P24"."""
    rows, columns = _plate_shape(plate_format)
    match = _WELL_PATTERN.match(well) if isinstance(well, str) else None
    if match is None:
        raise InputError(
            f"well {well!r} is not a well name; expected a row letter and a column number, "
            f"e.g. 'A01'"
        )
    row = ord(match.group(1).upper()) - ord("A")
    column = int(match.group(2)) - 1
    if not (0 <= row < rows and 0 <= column < columns):
        last = f"{chr(ord('A') + rows - 1)}{columns:02d}"
        raise InputError(
            f"well {well!r} is outside a {plate_format}-well plate; allowed A01 to {last}"
        )
    return row, column


def well_index(well: str, plate_format: int = 96) -> int:
    """Row-major zero-based index of a well: index = row · columns + column."""
    row, column = parse_well(well, plate_format)
    return row * _plate_shape(plate_format)[1] + column


def all_wells(plate_format: int = 96) -> tuple[str, ...]:
    """Every well of the plate in row-major order: A01, A02, … (A–H × 1–12 or A–P × 1–24)."""
    rows, columns = _plate_shape(plate_format)
    return tuple(
        f"{chr(ord('A') + row)}{column + 1:02d}" for row in range(rows) for column in range(columns)
    )


WELLS_LISTED = 8  # wells named in a message before "and N more"


def listed_wells(wells: list[str]) -> str:
    """Well names for a message: the first few, then how many more."""
    more = len(wells) - WELLS_LISTED
    return ", ".join(wells[:WELLS_LISTED]) + (f" and {more} more" if more > 0 else "")
