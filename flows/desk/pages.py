"""Rendering the desk's pages: one Jinja2 environment, autoescape always on, the stylesheet shipped beside it."""

from __future__ import annotations

import json
from functools import cache
from importlib import resources
from typing import Any

from jinja2 import Environment, PackageLoader, StrictUndefined

CSS_NAME = "desk.css"


@cache
def environment() -> Environment:
    env = Environment(loader=PackageLoader("flows.desk", "templates"), autoescape=True,
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters["plain"] = lambda v: v if isinstance(v, str) else json.dumps(v, ensure_ascii=False, sort_keys=True)
    env.filters["num"] = lambda v, d=3: "—" if v is None else (f"{v:.{d}f}" if isinstance(v, int | float) else str(v))
    return env


@cache
def stylesheet() -> str:
    return resources.files("flows.desk").joinpath("templates", CSS_NAME).read_text(encoding="utf-8")


def render(template: str, **context: Any) -> str:
    """A page; ``static=True`` inlines the stylesheet and leaves out everything that needs the server."""
    context.setdefault("static", False)
    context.setdefault("session", None)
    context.setdefault("css", stylesheet() if context["static"] else "")
    return environment().get_template(template).render(**context)
