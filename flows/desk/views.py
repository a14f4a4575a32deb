"""What the desk's pages show, as frozen values built from the store's records (no HTML here).

The morning view groups every lot's latest decision: held first (by hold category, in the
reviewer's reading order), then overdue, pending and ready for release; the latest night's
counts are recomputed from its stored decisions and files and set beside the night's own
summary, so a reviewer sees that they reconcile.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.night.site_lots import latest_of_site
from pipeline.records.desk_queries import (
    NightCounts,
    current_decisions,
    current_disposition_counts,
    latest_nights,
    night_disposition_counts,
    night_file_counts,
    set_aside_files,
)
from pipeline.records.store import Store
from pipeline.records.stored import StoredDecision, StoredFile
from pipeline.records.workspace import Workspace
from pipeline.release.dossier import local_time_text
from pipeline.vocabulary import Disposition, HoldCategory


@dataclass(frozen=True)
class LotLine:
    lot_id: str
    product: str
    revision: int
    label: str
    reasons: tuple[str, ...]
    decided_local: str


@dataclass(frozen=True)
class Group:
    title: str
    key: str
    lots: tuple[LotLine, ...]


@dataclass(frozen=True)
class Reconciliation:
    """The latest night's summary beside what its stored records add up to."""

    night: NightCounts
    decided_stored: int
    by_disposition: tuple[tuple[str, int], ...]
    files_recorded: int
    quarantined_recorded: int

    @property
    def files_balance(self) -> bool:
        return self.night.files_received == self.night.files_archived + self.night.files_quarantined

    @property
    def agrees(self) -> bool:
        return (self.files_balance and self.decided_stored == self.night.lots_decided
                and self.quarantined_recorded == self.night.files_quarantined)


@dataclass(frozen=True)
class MorningView:
    plant: str
    time_zone: str
    nights: tuple[NightCounts, ...]
    nights_local: tuple[str, ...]
    groups: tuple[Group, ...]  # held first
    decided_elsewhere: tuple[tuple[str, int], ...]  # released / rejected: counts only
    reconciliation: Reconciliation | None
    quarantined: tuple[StoredFile, ...]


def _line(d: StoredDecision, tz: str) -> LotLine:
    return LotLine(d.lot_id, d.record.product, d.revision, d.record.label or d.disposition, tuple(d.record.reasons),
                   local_time_text(d.decided_at_utc, tz))


SETTLED = (Disposition.RELEASED, Disposition.REJECTED)  # need nothing of a person: counted, not listed


def group_lots(decisions: list[StoredDecision], tz: str) -> tuple[tuple[Group, ...], tuple[tuple[str, int], ...]]:
    """Latest decisions into the morning's groups (held by category first); any other disposition counted."""
    held: dict[HoldCategory, list[LotLine]] = {c: [] for c in HoldCategory if c != HoldCategory.OVERDUE}
    overdue: list[LotLine] = []
    pending: list[LotLine] = []
    ready: list[LotLine] = []
    other: dict[str, int] = {}
    for d in decisions:
        categories = HoldCategory.in_reading_order(d.record.hold_categories)
        if HoldCategory.OVERDUE in categories:
            overdue.append(_line(d, tz))
        elif d.disposition == Disposition.HELD:
            first = next((c for c in categories if c != HoldCategory.OVERDUE), HoldCategory.REVIEW_REQUIRED)
            held[first].append(_line(d, tz))
        elif d.disposition == Disposition.PENDING:
            pending.append(_line(d, tz))
        elif d.disposition == Disposition.READY_FOR_RELEASE:
            ready.append(_line(d, tz))
        else:
            other[d.disposition] = other.get(d.disposition, 0) + 1
    groups = [Group(f"Held: {category}", "held", tuple(lines)) for category, lines in held.items() if lines]
    groups += [Group(title, key, tuple(lines)) for title, key, lines in (
        ("Overdue: a required result is past its turnaround", "overdue", overdue),
        ("Pending: results still due", "pending", pending),
        ("Ready for release: awaiting an authorised person", "ready", ready)) if lines]
    return tuple(groups), tuple(sorted(other.items()))


def reconcile(store: Store, night: NightCounts) -> Reconciliation:
    counts = night_disposition_counts(store, night.id)
    recorded, aside = night_file_counts(store, night.id)
    return Reconciliation(night, sum(counts.values()), tuple(sorted(counts.items())), recorded, aside)


def morning_view(ws: Workspace, store: Store, *, night_id: int | None = None) -> MorningView:
    """The morning view of the workspace now; ``night_id``: with that night as the latest (its static page,
    written as the night ends). Settled lots (released, rejected) are counted in the database, not read."""
    site = ws.site_id()
    nights = latest_nights(store, 5 if night_id is None else 10_000, site)
    if night_id is not None:
        nights = [n for n in nights if n.id <= night_id][:5]
    groups, others = group_lots(current_decisions(store, except_dispositions=SETTLED, site_id=site), ws.time_zone)
    settled = current_disposition_counts(store, site)
    others = tuple(sorted({**dict(others), **{d: n for d, n in settled.items() if d in SETTLED}}.items()))
    latest = nights[0] if nights else None
    quarantined = tuple(set_aside_files(store, [n.id for n in nights]))
    return MorningView(ws.plant_name, ws.time_zone, tuple(nights),
                       tuple(local_time_text(n.started_at_utc, ws.time_zone) for n in nights), groups, others,
                       None if latest is None else reconcile(store, latest), quarantined)


@dataclass(frozen=True)
class Document:
    label: str
    path: str  # relative to the workspace; served through the desk's checked file route


@dataclass(frozen=True)
class LotView:
    latest: StoredDecision
    history: tuple[StoredDecision, ...]
    decided_local: str
    verdicts: tuple[dict[str, Any], ...]  # from the batch report's dossier: limits, values, verdicts
    plates: tuple[dict[str, Any], ...]  # validity checks of the plates behind the results
    documents: tuple[Document, ...]
    inputs: tuple[Document, ...]
    trended: tuple[str, ...]


def _dossier(ws: Workspace, decision: StoredDecision) -> dict[str, Any]:
    """The dossier written with the lot's batch report (latest revision that has one)."""
    for revision in range(decision.revision, 0, -1):
        path = ws.reports / f"{decision.lot_id}_r{revision}_dossier.json"
        if path.is_file():
            try:
                return json.loads(path.read_text(encoding="utf-8"))
            except (OSError, ValueError):
                return {}
    return {}


def lot_view(ws: Workspace, store: Store, lot_id: str, trended: tuple[str, ...]) -> LotView | None:
    if latest_of_site(ws, store, lot_id) is None:
        return None
    history = tuple(store.decisions(lot_id))
    if not history:
        return None
    latest = history[-1]
    dossier = _dossier(ws, latest)
    documents = []
    for d in reversed(history):
        if d.record.certificate is not None:
            documents.append(Document(f"certificate, revision {d.revision}", f"certificates/{d.record.certificate.file}"))
        if d.record.report is not None:
            documents.append(Document(f"batch report, revision {d.revision}", f"reports/{d.record.report.file}"))
    archived = store.archived_files(sorted(set(latest.record.input_files.values())))
    inputs = tuple(Document(f.file_name, f.stored_as) for f in sorted(archived.values(), key=lambda f: f.file_name))
    return LotView(latest, history, local_time_text(latest.decided_at_utc, ws.time_zone),
                   tuple(dossier.get("verdicts") or ()), tuple(dossier.get("plates") or ()), tuple(documents),
                   inputs, trended)


def document_path(root: Path, relative: str, allowed: tuple[str, ...]) -> Path | None:
    """A workspace file the desk may serve, or None: no '..', no absolute path, no link leaving the folders.

    The path is resolved (symbolic links followed) and must still lie inside one of the ``allowed``
    folders of the workspace, and be a regular file whose name does not start with a dot.
    """
    if not relative or "\x00" in relative or relative.startswith(("/", "\\")) or "\\" in relative:
        return None
    parts = Path(relative).parts
    if any(p in ("..", ".") or p.startswith(".") for p in parts) or Path(relative).is_absolute():
        return None
    base = root.resolve()
    target = (base / relative).resolve()
    if not any(target.is_relative_to((base / folder).resolve()) for folder in allowed):
        return None
    return target if target.is_file() else None
