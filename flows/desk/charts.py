"""A control chart for a page: the product's attribute, its view from the store, its SVG and limit versions."""

from __future__ import annotations

from dataclasses import dataclass

from markupsafe import Markup

from flows.desk.svg_chart import chart_svg
from pipeline.controlled.specs import Attribute
from pipeline.errors import NotFound
from pipeline.records.chart_queries import chart_history, limit_versions
from pipeline.records.controlled_files import controlled_folders, load_catalog
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.release.chart_view import ChartView, StoredLimits, build_chart_view

WINDOW = 30


@dataclass(frozen=True)
class ChartPage:
    product: str
    attribute: Attribute
    view: ChartView
    svg: Markup
    versions: tuple[StoredLimits, ...]


def trended_attributes(ws: Workspace) -> dict[str, tuple[str, ...]]:
    """Each product's charted attributes, from the specifications in force."""
    catalog = load_catalog(controlled_folders(ws))
    return {code: tuple(a.code for a in spec.attributes if a.trend) for code, spec in catalog.specifications.items()}


def chart_page_data(ws: Workspace, store: Store, product: str, attribute: str, *,
                    highlight: str | None = None) -> ChartPage:
    catalog = load_catalog(controlled_folders(ws))
    spec = catalog.specifications.get(product)
    if spec is None:
        raise NotFound(f"no specification for product {product}; known: {', '.join(sorted(catalog.specifications))}")
    charted = [a for a in spec.attributes if a.trend]
    found = next((a for a in charted if a.code == attribute), None)
    if found is None:
        raise NotFound(f"product {product} has no charted attribute {attribute}; charted: "
                       f"{', '.join(a.code for a in charted) or 'none'}")
    view = build_chart_view(chart_history(store, product, attribute, WINDOW), found, WINDOW)
    return ChartPage(product, found, view, chart_svg(view, highlight=highlight),
                     limit_versions(store, product, attribute))
