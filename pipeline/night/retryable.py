"""The night's I/O stages in the form Prefect may run again after a transient failure.

Prefect retries the stages that read and write the store and the workspace's folders (never the
computation) when the failure may pass (``records.transient``). A retry must reach the records an
uninterrupted night would have, so each stage here is made safe to run again:

- opening the night's records (recovery of earlier nights, then a new night row) is the same
  recovery a restart after a kill runs;
- reading the control charts only reads;
- publishing first settles what a failed attempt left staged (``staging.recover_documents``:
  documents whose decision was committed are moved into place, others removed and recorded),
  then stores only the lots whose fingerprints are not stored yet (as a restart does); lots
  stored by the failed attempt count as decided tonight;
- receiving and closing record files and then move them; an attempt that failed after some of
  its files were recorded is not run again (``PartlyRecorded``): the night fails, is recorded as
  interrupted, and the next run's recovery completes those moves from the records.
"""

from __future__ import annotations

import dataclasses
from typing import Any

from pipeline.controlled.catalog import Catalog
from pipeline.errors import LotgateError
from pipeline.intake.assembly import QuarantinedFile
from pipeline.night.close import NightSummary, close
from pipeline.night.open import CertificateSigner
from pipeline.night.progress import Progress, no_progress
from pipeline.night.publish import Outcome, publish
from pipeline.night.receive import Intake, receive
from pipeline.night.recovery import Recovery, recover_interrupted
from pipeline.night.staging import recover_documents
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.release.decision import NightDecisions


class PartlyRecorded(LotgateError):
    """A stage failed after recording part of its work; only the next run's recovery may complete it."""


def open_night_records(ws: Workspace, store: Store, identity: str, code_version: str) -> tuple[Recovery, int]:
    """Earlier unfinished nights recovered, then tonight's night row (a retry recovers again: idempotent)."""
    recovered = recover_interrupted(ws, store, identity)
    night_id = store.start_night(code_version, identity, shared=ws.store_shared)
    return recovered, night_id


def receive_unless_recorded(ws: Workspace, store: Store, layouts: dict, night_id: int,
                            progress: Progress = no_progress, carried: list[QuarantinedFile] | None = None) -> Intake:
    if store.files(night_id):
        raise PartlyRecorded(f"night {night_id} failed while setting files aside after recording some of them; "
                             "the next run completes it")
    return receive(ws, store, layouts, night_id, progress, carried)


def publish_settled(ws: Workspace, store: Store, catalog: Catalog, decided: NightDecisions, night_id: int,
                    signer: CertificateSigner, progress: Progress = no_progress, renderers: Any = None) -> list[Outcome]:
    recover_documents(ws, store, interrupted=False)  # nothing to do on a first attempt
    outcomes = publish(ws, store, catalog, decided, night_id, signer, progress, renderers=renderers)
    if all(o.new for o in outcomes):
        return outcomes
    stored = store.known_fingerprints([item.decision.fingerprint for item in decided.lots])
    fixed = []
    for item, outcome in zip(decided.lots, outcomes, strict=True):
        earlier = stored.get(item.decision.fingerprint)
        if not outcome.new and earlier is not None and earlier.record.night_id == night_id:
            record = earlier.record
            outcome = dataclasses.replace(
                outcome, new=True,
                certificate=None if record.certificate is None else f"certificates/{record.certificate.file}",
                report=None if record.report is None else f"reports/{record.report.file}")
        fixed.append(outcome)
    return fixed


def close_unless_recorded(ws: Workspace, store: Store, intake: Intake, outcomes: list[Outcome],
                          notes: list[str], signer: Any = None) -> NightSummary:
    if any(f.status == "archived" for f in store.files(intake.night_id)):
        raise PartlyRecorded(f"night {intake.night_id} failed while archiving its files after recording them; "
                             "the next run completes it")
    return close(ws, store, intake, outcomes, notes, signer)
