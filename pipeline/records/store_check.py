"""The store's own checks for ``lotgate verify``: every record row against its hash and its event,
and the append-only triggers in place (adapter: reads the store, returns findings)."""

from __future__ import annotations

from pipeline.records import append_only, row_hashes
from pipeline.records.store import Store
from pipeline.records.tables import APPEND_ONLY_TABLES


def check_rows(store: Store) -> row_hashes.RowsCheck:
    """Recompute every record row's hash and match rows with the events that wrote them."""
    bodies = (event.body for event in store.audit_events())
    with store.session() as session:
        return row_hashes.verify_rows(session, bodies)


def unprotected_tables(store: Store) -> list[str]:
    """Record tables whose triggers refusing UPDATE and DELETE are missing (dropped by someone)."""
    with store.engine.connect() as connection:
        return append_only.missing_triggers(connection, APPEND_ONLY_TABLES)
