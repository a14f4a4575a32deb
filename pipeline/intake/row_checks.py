"""Stage 3 of reading an export: rows against each other, once every cell is valid (pure).

Wells inside the plate format, one format and method per plate, the fields a well's role
needs, read times that increase within a well, no more reads per well than the layout's cap, an assay date not before the manufacturing date,
and no manufacturing, assay or test date in the future (a wrong clock on the instrument or a typing
error; one day is allowed for time zones ahead of UTC).
"""

from __future__ import annotations

import datetime as dt
import math

import pandas as pd

from pipeline.intake.problems import Problem
from pipeline.vocabulary import ProblemCode

PLATE_GEOMETRY = {96: ("ABCDEFGH", 12), 384: ("ABCDEFGHIJKLMNOP", 24)}
ROLE_NEEDS = {  # plate-map role -> fields that must not be empty for it
    "sample": ("lot_id",),
    "kinetic": ("lot_id", "substrate_mm"),
    "reference": ("lot_id",),
    "standard": ("nominal_mg_per_ml",),
}

def _plate_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Plate maps: each well inside the plate's format; one format and method per plate; role fields."""
    problems: list[Problem] = []
    for index, row in enumerate(frame.itertuples(index=False)):
        rows, columns = PLATE_GEOMETRY[int(row.plate_format)]
        well = str(row.well)
        if well[0] not in rows or int(well[1:]) > columns:
            problems.append(Problem(ProblemCode.WELL_OUTSIDE_PLATE, f"well {well} is outside a {int(row.plate_format)}-well plate "
                                    f"(rows {rows[0]}–{rows[-1]}, columns 01–{columns})", line=lines[index], column="well"))
        for needed in ROLE_NEEDS.get(str(row.role), ()):
            value = getattr(row, needed)
            if value is None or (isinstance(value, float) and math.isnan(value)):
                problems.append(Problem(ProblemCode.ROLE_FIELDS, f"a '{row.role}' well needs a value in '{needed}'; well {well} has none",
                                        line=lines[index], column=needed))
    for column in ("plate_format", "method_id"):
        for plate_id, values in frame.groupby("plate_id", sort=True)[column]:
            distinct = sorted({str(v) for v in values})
            if len(distinct) > 1:
                first = lines[int(values.index[(values.astype(str) != str(values.iloc[0])).argmax()])]
                problems.append(Problem(ProblemCode.PLATE_INCONSISTENT, f"plate {plate_id} is given with more than one {column} "
                                        f"({', '.join(distinct)}); a plate has one", line=first, column=column))
    return problems


def _time_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Kinetic reads: within each well, read times increase from one row to the next."""
    previous = frame.groupby(["plate_id", "well"], sort=False)["time_s"].shift()
    back = frame.index[(frame["time_s"] < previous).to_numpy()]
    problems: list[Problem] = []
    flagged: set[tuple[str, str]] = set()
    for index in back:
        plate_id, well = str(frame.at[index, "plate_id"]), str(frame.at[index, "well"])
        if (plate_id, well) in flagged:
            continue
        flagged.add((plate_id, well))
        problems.append(Problem(ProblemCode.TIME_ORDER, f"well {well} of plate {plate_id}: the read at {frame.at[index, 'time_s']:g} s "
                                f"comes after a read at {previous.at[index]:g} s; read times must increase within a well",
                                line=lines[int(index)], column="time_s"))
    return problems


def _reads_problems(frame: pd.DataFrame, lines: list[int], cap: int, layout: str) -> list[Problem]:
    """Kinetic reads: no well with more reads than the layout's cap (one problem per plate)."""
    counts = frame.groupby(["plate_id", "well"], sort=False).size()
    over = counts[counts > cap]
    problems: list[Problem] = []
    for plate_id, wells in over.groupby(level=0, sort=True):
        most = wells.droplevel(0)
        well, reads = str(most.idxmax()), int(most.max())
        first_beyond = frame.index[(frame["plate_id"] == plate_id) & (frame["well"] == well)][cap]
        others = f" ({len(most) - 1} other well(s) too)" if len(most) > 1 else ""
        problems.append(Problem(ProblemCode.TOO_MANY_READS, f"well {well} of plate {plate_id} has {reads:,} reads{others}; "
                                f"the {layout} layout allows at most {cap:,} reads per well",
                                line=lines[int(first_beyond)], column="time_s"))
    return problems


def _registry_problems(frame: pd.DataFrame, lines: list[int]) -> list[Problem]:
    """Lot registry: a lot cannot be assayed before it was manufactured."""
    problems = []
    for index, (lot, made, assayed) in enumerate(zip(frame["lot_id"], frame["manufactured_on"], frame["assay_date"], strict=True)):
        if dt.date.fromisoformat(assayed) < dt.date.fromisoformat(made):
            problems.append(Problem(ProblemCode.DATE_ORDER, f"lot {lot}: the assay date {assayed} is before the manufacturing date {made}",
                                    line=lines[index], column="assay_date"))
    return problems


FUTURE_DATE_COLUMNS = {"manufactured_on": "manufacturing date", "assay_date": "assay date", "tested_on": "test date"}
FUTURE_ALLOWED_DAYS = 1  # the plant's date may be one day ahead of the UTC date


def _future_problems(frame: pd.DataFrame, columns: set[str], lines: list[int], today_utc: dt.date) -> list[Problem]:
    """No date after today (UTC) plus one day: a result cannot be dated after the night that reads it."""
    latest = today_utc + dt.timedelta(days=FUTURE_ALLOWED_DAYS)
    problems = []
    for column in sorted(columns & FUTURE_DATE_COLUMNS.keys()):
        for index, value in enumerate(frame[column]):
            if isinstance(value, str) and value and dt.date.fromisoformat(value) > latest:
                problems.append(Problem(ProblemCode.FUTURE_DATE, f"the {FUTURE_DATE_COLUMNS[column]} {value} is in the "
                                        f"future (today is {today_utc.isoformat()} UTC); a date cannot be later than "
                                        "the night that reads it", line=lines[index], column=column))
    return problems


def row_problems(frame: pd.DataFrame, columns: set[str], lines: list[int], today_utc: dt.date | None = None,
                 max_reads_per_well: int | None = None, layout: str = "export") -> list[Problem]:
    """Every row problem; ``today_utc``: the date the future-date check compares with (default: the clock's).

    ``max_reads_per_well`` is the layout's cap on reads per well (layouts of reads over time), ``layout``
    its name and version as the message gives them.
    """
    problems: list[Problem] = _future_problems(frame, columns, lines, today_utc or dt.datetime.now(dt.UTC).date())
    if {"plate_id", "plate_format", "well", "role"} <= columns:
        problems += _plate_problems(frame, lines)
    if {"plate_id", "well", "time_s"} <= columns:
        problems += _time_problems(frame, lines)
        if max_reads_per_well is not None:
            problems += _reads_problems(frame, lines, max_reads_per_well, layout)
    if {"lot_id", "manufactured_on", "assay_date"} <= columns:
        problems += _registry_problems(frame, lines)
    return problems
