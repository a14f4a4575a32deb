"""The lot record in the store (adapter): results across nights, investigation outcomes, documents' status.

Nothing here is ever updated or deleted: a result's new standing is a new row that names the
row it changes (``replaces``); a certificate superseded by a later revision gets a status row.
The rows of one lot's decision are written in the decision's own transaction
(``write_decision_rows``, called by ``Store.add_decisions``).
"""

from __future__ import annotations

import datetime as dt
from collections import defaultdict
from dataclasses import dataclass
from typing import Any

from sqlalchemy import exists, select
from sqlalchemy.orm import Session

from pipeline.records import row_hashes
from pipeline.records.current import is_latest_revision, of_site
from pipeline.records.stored import DecisionWrite, utc
from pipeline.records.tables import (
    ChartPoint,
    DecisionRow,
    DocumentStatusRow,
    InvestigationRow,
    Lot,
    LotResultRow,
)
from pipeline.release.lot_record import Investigation, LotHistory, LotResult
from pipeline.vocabulary import InvestigationOutcome, ResultStatus, Verdict

CHUNK = 500
SUPERSEDED = "superseded"


def _now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _result_values(result: LotResult) -> dict[str, Any]:
    return {"lot_id": None, "attribute": result.attribute, "status": str(result.status), "replaces": None,
            "verdict": str(result.verdict), "value": result.value if isinstance(result.value, int | float) else None,
            "value_text": result.value if isinstance(result.value, str) else None, "reported": result.reported,
            "unit": result.unit, "se": result.se, "tested_on": result.tested_on, "source": result.source,
            "method": result.method, "plate_id": result.plate_id, "analyst": result.analyst,
            "files": dict(result.files), "reasons": list(result.reasons), "reference": None}


def write_decision_rows(s: Session, w: DecisionWrite, row: DecisionRow, previous: DecisionRow | None) -> None:
    """Inside ``Store.add_decisions``: the lot's new results, their status changes, and its superseded certificate."""
    now, lot = _now(), w.record.lot_id
    values = [{**_result_values(r), "lot_id": lot, "night_id": w.night_id, "decision_id": row.id,
               "recorded_by": w.decided_by, "recorded_at_utc": now} for r in w.lot_results]
    values += [{"lot_id": lot, "attribute": c.attribute, "status": str(c.status), "replaces": c.result_id,
                "night_id": w.night_id, "decision_id": row.id, "reasons": [c.reason], "recorded_by": w.decided_by,
                "recorded_at_utc": now} for c in w.status_changes]
    if values:
        row_hashes.insert_rows(s, LotResultRow, values)  # hashed and named like every record row
    earlier = (previous.record or {}).get("certificate") if previous is not None else None
    if earlier:
        s.add(DocumentStatusRow(file=earlier["file"], sha256=earlier["sha256"], lot_id=lot, revision=previous.revision,
                                status=SUPERSEDED, superseded_by_revision=row.revision,
                                reason=f"lot {lot} revision {row.revision} ({w.record.label}) replaces revision "
                                       f"{previous.revision}", recorded_at_utc=now))


def _result_of(row: LotResultRow, standing: LotResultRow | None) -> LotResult:
    value: float | str | None = row.value if row.value is not None else row.value_text
    status = ResultStatus(standing.status if standing is not None else row.status)
    return LotResult(row.attribute, status, Verdict(row.verdict or Verdict.MISSING), value, row.reported,
                     row.unit or "", row.se, row.tested_on or "", row.source or "", row.method, dict(row.files or {}),
                     tuple(row.reasons or ()), row.plate_id, row.analyst, row.night_id, row.id,
                     None if standing is None else "; ".join(standing.reasons or ()),
                     None if standing is None else standing.reference)


def load_histories(store: Any, lot_ids: list[str], exclude_decisions: set[int] | None = None) -> dict[str, LotHistory]:
    """Each lot's record as it stood before tonight (rows of the ``exclude_decisions`` left out: a stopped
    attempt of this night stored them). Results oldest first, each with its latest standing."""
    exclude = exclude_decisions or set()
    results: dict[str, list[LotResultRow]] = defaultdict(list)
    standings: dict[int, LotResultRow] = {}
    investigations: dict[str, list[Investigation]] = defaultdict(list)
    with store.session() as s:
        for start in range(0, len(lot_ids), CHUNK):
            chunk = lot_ids[start:start + CHUNK]
            for row in s.scalars(select(LotResultRow).where(LotResultRow.lot_id.in_(chunk)).order_by(LotResultRow.id)):
                if row.decision_id in exclude:
                    continue
                if row.replaces is None:
                    results[row.lot_id].append(row)
                else:
                    standings[row.replaces] = row  # the latest standing wins (ordered by id)
            for inv in s.scalars(select(InvestigationRow).where(InvestigationRow.lot_id.in_(chunk))
                                 .order_by(InvestigationRow.id)):
                investigations[inv.lot_id].append(Investigation(
                    inv.attribute, inv.result_id, InvestigationOutcome(inv.outcome), inv.reference, inv.reason,
                    inv.retest_plan, inv.decided_by, utc(inv.recorded_at_utc).isoformat(timespec="seconds")))
    return {lot: LotHistory(tuple(_result_of(r, standings.get(r.id)) for r in results.get(lot, [])),
                            tuple(investigations.get(lot, [])))
            for lot in lot_ids if lot in results or lot in investigations}


def charted_lots(store: Any, lot_ids: list[str], exclude_decisions: set[int] | None = None) -> frozenset[tuple[str, str, str]]:
    """(chart, attribute, lot) of these lots already on a control chart (points of ``exclude_decisions`` left out)."""
    exclude = exclude_decisions or set()
    out: set[tuple[str, str, str]] = set()
    with store.session() as s:
        for start in range(0, len(lot_ids), CHUNK):
            for point in s.scalars(select(ChartPoint).where(ChartPoint.lot_id.in_(lot_ids[start:start + CHUNK]))):
                if point.decision_id not in exclude:
                    out.add((point.product_code, point.attribute, point.lot_id))
    return frozenset(out)


def investigated_lots(store: Any, site_id: str | None = None) -> list[tuple[str, str, str]]:
    """(lot, product, manufactured on) of every lot the nightly job holds whose record gained a signed
    investigation outcome after that decision: its record now reads otherwise, so it is decided again.
    Only the lots of the site ``site_id`` when sites share the store (None: every lot)."""
    later = (select(InvestigationRow.id).where(InvestigationRow.lot_id == DecisionRow.lot_id,
                                               InvestigationRow.recorded_at_utc > DecisionRow.decided_at_utc)
             .exists())
    with store.session() as s:
        rows = s.execute(select(DecisionRow.lot_id, Lot.product_code, Lot.manufactured_on)
                         .join(Lot, Lot.lot_id == DecisionRow.lot_id)
                         .where(is_latest_revision(), DecisionRow.disposition == "held",
                                DecisionRow.decided_by.startswith("lotgate"), later,
                                of_site(DecisionRow.lot_id, site_id))
                         .order_by(DecisionRow.lot_id)).all()
    return [(lot, product, made or "") for lot, product, made in rows]


def pending_lots(store: Any, site_id: str | None = None) -> list[tuple[str, str, str]]:
    """(lot, product, manufactured on) of every lot whose latest decision is the nightly job's "pending"
    (of the site ``site_id`` only, when sites share the store)."""
    with store.session() as s:
        rows = s.execute(select(DecisionRow.lot_id, Lot.product_code, Lot.manufactured_on)
                         .join(Lot, Lot.lot_id == DecisionRow.lot_id)
                         .where(is_latest_revision(), DecisionRow.disposition == "pending",
                                DecisionRow.decided_by.startswith("lotgate"), of_site(DecisionRow.lot_id, site_id))
                         .order_by(DecisionRow.lot_id)).all()
    return [(lot, product, made or "") for lot, product, made in rows]


@dataclass(frozen=True)
class InvestigationWrite:
    lot_id: str
    attribute: str
    result_id: int
    outcome: InvestigationOutcome
    reference: str
    reason: str
    retest_plan: str
    decided_by: str
    signature: dict[str, Any]


def add_investigation(store: Any, w: InvestigationWrite, events: list[dict[str, Any]]) -> None:
    """The outcome, the result's new standing (invalidated) and the audit events, in one transaction."""
    now = _now()
    with store.session() as s:
        s.add(InvestigationRow(lot_id=w.lot_id, attribute=w.attribute, result_id=w.result_id, outcome=str(w.outcome),
                               reference=w.reference, reason=w.reason, retest_plan=w.retest_plan,
                               decided_by=w.decided_by, signature=w.signature, recorded_at_utc=now))
        if w.outcome == InvestigationOutcome.RESULT_INVALIDATED:
            s.add(LotResultRow(lot_id=w.lot_id, attribute=w.attribute, status=str(ResultStatus.INVALIDATED),
                               replaces=w.result_id, reasons=[f"invalidated by {w.decided_by} under investigation "
                                                              f"{w.reference}: {w.reason}"],
                               reference=w.reference, recorded_by=w.decided_by, recorded_at_utc=now))
        s.flush()
        store.chain_events(s, events)


@dataclass(frozen=True)
class CertificateStatus:
    """A certificate as the record knows it: current, or superseded by a later revision of its lot."""

    file: str
    lot_id: str
    revision: int
    sha256: str
    status: str  # "current" or "superseded"
    superseded_by_revision: int | None = None
    reason: str | None = None


def certificate_status(store: Any, file: str) -> CertificateStatus | None:
    """The standing of the certificate named ``file`` (its file name); None when no decision names it."""
    name = file.rsplit("/", 1)[-1]
    with store.session() as s:
        status = s.scalars(select(DocumentStatusRow).where(DocumentStatusRow.file == name)
                           .order_by(DocumentStatusRow.id.desc()).limit(1)).first()
        if status is not None:
            return CertificateStatus(name, status.lot_id, status.revision, status.sha256, status.status,
                                     status.superseded_by_revision, status.reason)
        lot = name.rsplit("_r", 1)[0]  # documents are named LOT_rREVISION…
        for row in s.scalars(select(DecisionRow).where(DecisionRow.lot_id == lot).order_by(DecisionRow.id.desc())):
            certificate = (row.record or {}).get("certificate")
            if certificate and certificate.get("file") == name:
                return CertificateStatus(name, row.lot_id, row.revision, certificate["sha256"], "current")
    return None


def of_other_site(store: Any, lot_id: str, site_id: str | None) -> bool:
    """Whether the store holds decisions of ``lot_id`` but the lot belongs to another site sharing it."""
    if site_id is None:
        return False
    with store.session() as s:
        known = s.scalar(select(exists().where(DecisionRow.lot_id == lot_id)))
        mine = s.scalar(select(exists().where(DecisionRow.lot_id == lot_id, of_site(DecisionRow.lot_id, site_id))))
    return bool(known) and not mine
