"""Strict reading of settings and controlled files: a declared schema per file, one message per refusal.

Every settings or controlled file (``workspace.yaml``, product specifications, assay methods, the
``lotgate_export`` header of export layouts) is declared as a pydantic model built on ``Strict``:
unknown keys, NaN and infinity, and values of the wrong type are refused. ``checked`` validates a
parsed YAML mapping against such a model and turns the first refusal into a SpecificationError
that names the file, the field and what is allowed (the nearest known key for a typo). pydantic's
own wording never reaches a person; the loaders then build the project's frozen objects from the
checked model.
"""

from __future__ import annotations

import datetime as dt
import difflib
import types
from typing import Annotated, Any, TypeVar, Union, get_args, get_origin

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, ValidationError

from pipeline.errors import SpecificationError

M = TypeVar("M", bound=BaseModel)


class Strict(BaseModel):
    """A settings or controlled-file section: no unknown keys, no NaN or infinity, no coercion."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, strict=True, frozen=True)


def _iso_date(value: Any) -> Any:
    """A date as YAML gives it (2026-06-01) or as text 'YYYY-MM-DD'; nothing else (no day numbers)."""
    if isinstance(value, dt.datetime):
        raise ValueError(f"must be a date YYYY-MM-DD without a time, found {value!r}")
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value)
        except ValueError:
            pass
    raise ValueError(f"must be a date YYYY-MM-DD, found {value!r}")


IsoDate = Annotated[dt.date, BeforeValidator(_iso_date)]
Text = Annotated[str, Field(min_length=1, description="non-empty text")]

_TYPE_WORDS = {
    "float_type": "a number", "int_type": "a whole number", "int_from_float": "a whole number",
    "string_type": "text", "bool_type": "true or false", "date_type": "a date YYYY-MM-DD",
    "list_type": "a list", "tuple_type": "a list", "dict_type": "a mapping", "model_type": "a mapping",
    "model_attributes_type": "a mapping",
}
_BOUND_WORDS = {"greater_than": ("gt", "above"), "greater_than_equal": ("ge", "at least"),
                "less_than": ("lt", "below"), "less_than_equal": ("le", "at most")}


def checked(model: type[M], raw: Any, where: str) -> M:
    """``raw`` validated against ``model``, or a SpecificationError naming ``where``, the field and what is allowed."""
    try:
        return model.model_validate(raw)
    except ValidationError as exc:
        errors = exc.errors()
        # A mistyped key is reported as such (with the key it resembles), not as the field it left missing.
        first = next((e for e in errors if e["type"] == "extra_forbidden"), errors[0])
        raise SpecificationError(f"{where}: {refusal(model, first, raw)}") from exc


def refusal(model: type[BaseModel], error: Any, raw: Any = None) -> str:
    """One pydantic error as a sentence in the engineer's words (field path, what was found, what is allowed).

    A field inside a list of coded entries (a specification's attributes) also names the entry's code.
    """
    loc = tuple(part for part in error["loc"] if isinstance(part, int | str))
    field = f"'{_path(loc)}'{_entry_code(raw, loc)}"
    kind, found, ctx = error["type"], error.get("input"), error.get("ctx") or {}
    if kind == "extra_forbidden":
        return _unknown_key(model, loc, raw)
    if kind == "missing" or (found is None and kind in _TYPE_WORDS):
        return f"the field {field} is missing"
    if not loc and kind in _TYPE_WORDS:
        return f"expected a mapping of fields at the top level, found {_shown(found)}"
    if kind == "finite_number":
        return f"{field} must be a finite number, found {_shown(found)} (NaN and infinity are not limits)"
    if kind in _BOUND_WORDS:
        key, word = _BOUND_WORDS[kind]
        bound = "zero" if ctx.get(key) == 0 else ctx.get(key)
        return f"{field} must be {word} {bound}, found {_shown(found)}"
    if kind in ("too_short", "string_too_short"):
        return f"{field} must not be empty"
    if kind == "literal_error":
        return f"{field} must be {ctx.get('expected')}, found {_shown(found)}"
    if kind == "value_error":
        return f"{field} {ctx.get('error')}"
    wanted = _described(model, loc) or _TYPE_WORDS.get(kind, "a value of another kind")
    return f"{field} must be {wanted}, found {_shown(found)}"


def _entry_code(raw: Any, loc: tuple[int | str, ...]) -> str:
    """" (code 'specific_activity')" for a field inside a list entry that has a code; else nothing."""
    code, current = None, raw
    for part in loc:
        try:
            current = current[part]
        except (KeyError, IndexError, TypeError):
            break
        if isinstance(part, int) and isinstance(current, dict) and isinstance(current.get("code"), str):
            code = current["code"]
    return f" (code '{code}')" if code else ""


def _path(loc: tuple[int | str, ...]) -> str:
    text = ""
    for part in loc:
        text += f"[{part + 1}]" if isinstance(part, int) else (f".{part}" if text else part)
    return text


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _unknown_key(model: type[BaseModel], loc: tuple[int | str, ...], raw: Any) -> str:
    key, known = str(loc[-1]), _fields_at(model, loc[:-1])
    near = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
    hint = f" (did you mean '{near[0]}'?)" if near else ""
    where = f" in '{_path(loc[:-1])}'{_entry_code(raw, loc[:-1])}" if loc[:-1] else ""
    return f"unknown field '{key}'{where}{hint}; allowed: {', '.join(known)}"


def _annotation_at(model: type[BaseModel], loc: tuple[int | str, ...]) -> Any:
    """The declared type at a field path (list items and mapping values followed through)."""
    current: Any = model
    for part in loc:
        current = _unwrapped(current)
        if isinstance(part, str) and isinstance(current, type) and issubclass(current, BaseModel):
            field = current.model_fields.get(part)
            current = field.annotation if field is not None else None
        else:
            args = [a for a in get_args(current) if a is not Ellipsis]
            current = args[-1] if args else None
    return _unwrapped(current)


def _unwrapped(annotation: Any) -> Any:
    """``X | None`` → X; ``Annotated[X, ...]`` → X."""
    if get_origin(annotation) is Annotated:
        annotation = get_args(annotation)[0]
    if get_origin(annotation) in (Union, types.UnionType):
        members = [a for a in get_args(annotation) if a is not type(None)]
        if len(members) == 1:
            return _unwrapped(members[0])
    return annotation


def _fields_at(model: type[BaseModel], loc: tuple[int | str, ...]) -> list[str]:
    current = _annotation_at(model, loc)
    if isinstance(current, type) and issubclass(current, BaseModel):
        return list(current.model_fields)
    return []


def _described(model: type[BaseModel], loc: tuple[int | str, ...]) -> str | None:
    """The field's own description of what it holds, when it declares one."""
    if not loc or not isinstance(loc[-1], str):
        return None
    parent = _annotation_at(model, loc[:-1])
    if isinstance(parent, type) and issubclass(parent, BaseModel):
        field = parent.model_fields.get(loc[-1])
        return field.description if field is not None else None
    return None
