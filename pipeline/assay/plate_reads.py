"""One plate's exports as the night assembles them, and what its evaluation may need beyond them."""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field

import pandas as pd

LOT_ROLES = ("sample", "kinetic")  # the plate map's roles of the wells that hold a lot


@dataclass(frozen=True)
class PlateReads:
    """A plate ready to evaluate: the plate map's wells, the reader's rows, the method named by the map."""

    plate_map: pd.DataFrame
    reads: pd.DataFrame
    method_id: str
    assay_date: dt.date | None = None  # the registered assay date of the plate's lots (chooses versions)
    method_version: str | None = None  # the method version in force on that date (None: the newest)


@dataclass(frozen=True)
class PlateContext:
    """What a plate's evaluation may need beyond its method: the products' constants, by lot."""

    a280_extinction_ml_per_mg_per_cm: Mapping[str, float] = field(default_factory=dict)
