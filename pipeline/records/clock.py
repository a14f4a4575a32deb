"""Time only goes forward in the records: an event dated before the chain's head is refused.

A computer's clock set back (by a person or a failing time source) would let a record appear
to have been made earlier than one already stored. ``set_back`` (pure) says so in one line when
the clock, at the moment of recording, is earlier than the head's time by more than the tolerance (the workspace setting
``clock_tolerance_minutes``, default 5: clocks of a plant's computers drift by seconds, not
minutes).
"""

from __future__ import annotations

import datetime as dt


def _moment(value: object) -> dt.datetime | None:
    try:
        moment = dt.datetime.fromisoformat(str(value))
    except ValueError:
        return None
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=dt.UTC)


def set_back(head_seq: int, head_time_utc: str, now: dt.datetime, tolerance: dt.timedelta) -> str | None:
    """Why nothing may be recorded now after the head (the clock was set back), or None.

    ``now`` is the clock at the moment of recording, not the events' own times: an event made
    earlier in a long night and chained later is not a clock set back.
    """
    head_time = _moment(head_time_utc)
    if head_time is None or head_time - now <= tolerance:
        return None
    return (f"this computer's clock says {now:%Y-%m-%d %H:%M:%S} UTC, but the last record (audit event "
            f"{head_seq}) was written at {head_time:%Y-%m-%d %H:%M:%S} UTC: the clock was set back; nothing "
            f"was recorded. Correct the clock (allowed drift {tolerance.total_seconds() / 60:g} minutes), "
            "then run again")
