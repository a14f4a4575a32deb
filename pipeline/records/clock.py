"""Time only goes forward in the records: an event dated before the chain's head is refused.

A computer's clock set back (by a person or a failing time source) would let a record appear
to have been made earlier than one already stored. ``set_back`` (pure) says so in one line when
an event is earlier than the head's time by more than the tolerance (the workspace setting
``clock_tolerance_minutes``, default 5: clocks of a plant's computers drift by seconds, not
minutes).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from typing import Any


def _moment(value: object) -> dt.datetime | None:
    try:
        moment = dt.datetime.fromisoformat(str(value))
    except ValueError:
        return None
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=dt.UTC)


def set_back(head_seq: int, head_time_utc: str, events: Iterable[dict[str, Any]], tolerance: dt.timedelta) -> str | None:
    """Why the events must not be recorded after the head (the clock was set back), or None."""
    head_time = _moment(head_time_utc)
    if head_time is None:
        return None
    for record in events:
        moment = _moment(record.get("time_utc", ""))
        if moment is not None and head_time - moment > tolerance:
            return (f"this computer's clock says {moment:%Y-%m-%d %H:%M:%S} UTC, but the last record (audit event "
                    f"{head_seq}) was written at {head_time:%Y-%m-%d %H:%M:%S} UTC: the clock was set back; nothing "
                    f"was recorded. Correct the clock (allowed drift {tolerance.total_seconds() / 60:g} minutes), "
                    "then run again")
    return None
