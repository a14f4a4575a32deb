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


def check_person_signatures(store: Store) -> tuple[int, list[str]]:
    """Every decision a person signed: the signature verifies over the record as it was signed
    (the record without its signature, canonical JSON). Returns (how many, problems in words)."""
    import dataclasses

    from pipeline.records import ledger
    from pipeline.records.signing import verify_record

    count, problems = 0, []
    for decision in store.decisions():
        signature = decision.record.person_signature
        if signature is None:
            continue
        count += 1
        signed = ledger.canonical_json(dataclasses.replace(decision.record, person_signature=None).to_json())
        if not verify_record(signature, signed.encode("utf-8")):
            problems.append(f"lot {decision.lot_id} revision {decision.revision}: the signature of "
                            f"{signature.get('signer_name', 'its signer')} does not match the record")
    return count, problems
