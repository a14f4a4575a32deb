"""The night's review page as a file: the morning view as of a night, self-contained (no script, no request).

Written by the night after it closes (``flows.nightly._stages``) into ``DIR/review/night-NNNN.html``:
the same templates as the desk, the stylesheet inlined, and a content security policy that lets the
page load nothing at all, so it reads the same where the desk is not running and is archived with the night.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from flows.desk.pages import render
from flows.desk.views import morning_view
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write
from pipeline.release.dossier import local_time_text

REVIEW_FOLDER = "review"


def night_page_html(ws: Workspace, store: Store, night_id: int) -> str:
    view = morning_view(ws, store, night_id=night_id)
    return render("night_page.html", static=True, plant=ws.plant_name, view=view, night_id=night_id,
                  written_local=local_time_text(dt.datetime.now(dt.UTC), ws.time_zone))


def write_night_page(ws: Workspace, store: Store, night_id: int) -> Path:
    path = ws.root / REVIEW_FOLDER / f"night-{night_id:04d}.html"
    atomic_write(path, night_page_html(ws, store, night_id).encode("utf-8"), durable=False)
    return path
