"""One plate's exports as the night assembles them: its plate map, its reads and its method."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd


@dataclass(frozen=True)
class PlateReads:
    """A plate ready to evaluate: the plate map's wells, the reader's rows, the method named by the map."""

    plate_map: pd.DataFrame
    reads: pd.DataFrame
    method_id: str
