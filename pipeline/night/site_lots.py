"""A person's act names a lot of this site (use case): where sites share one results store, a lot
belongs to the site whose nights decided it, and only that site's workspace holds its documents.
"""

from __future__ import annotations

from pipeline.errors import InputError
from pipeline.records.lot_record_store import of_other_site
from pipeline.records.store import Store
from pipeline.records.stored import StoredDecision
from pipeline.records.workspace import Workspace


def latest_of_site(ws: Workspace, store: Store, lot_id: str) -> StoredDecision | None:
    """The lot's latest decision (None: none stored); refused when the lot is another site's."""
    if of_other_site(store, lot_id, ws.site_id()):
        raise InputError(f"lot {lot_id} belongs to another site sharing the results store (its nights ran in "
                         f"another workspace, not {ws.root}); review it from that site's workspace. Nothing was "
                         "written")
    return store.latest_decision(lot_id)
