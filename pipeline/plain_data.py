"""One converter of result objects to JSON-able values (numpy scalars, tuples, non-finite floats)."""

from __future__ import annotations

import math
from dataclasses import is_dataclass
from typing import Any

_PLAIN = (str, int, bool, type(None))


def to_plain(value: Any) -> Any:
    """Turn numpy scalars and arrays, tuples, nested result objects and non-finite floats into JSON-able values.

    The common types are tested first by exact type: a night cleans millions of values.
    """
    kind = type(value)
    if kind is float:
        return value if math.isfinite(value) else None
    if kind in _PLAIN:
        return value
    if kind is dict:
        return {str(k): to_plain(v) for k, v in value.items()}
    if kind is list or kind is tuple:
        return [to_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): to_plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [to_plain(v) for v in value]
    if is_dataclass(value) and not isinstance(value, type):
        return to_plain(vars(value))
    if getattr(value, "ndim", 0):  # a numpy array: nested lists of Python scalars
        return to_plain(value.tolist())
    if hasattr(value, "item") and not isinstance(value, str | bytes):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
