"""Telling people about a night (use case): its facts gathered from the store, the message sent, the sending recorded.

The message itself is composed purely (``night_message``); this module reads what it needs,
sends through the workspace's recipients (``records.notify``) and records who was told (a
``night-notified`` audit event naming each recipient as written in the settings, never a secret).
A notification that fails never fails the night: it is recorded and reported.
"""

from __future__ import annotations

from dataclasses import dataclass

from pipeline.errors import LotgateError
from pipeline.night.close import NightSummary
from pipeline.night.night_message import (
    LotStanding,
    NightFacts,
    NightMessage,
    first_line,
    review_page,
    review_url,
)
from pipeline.records import audit
from pipeline.records.notify import NotifyError, SendReport, recipients, send
from pipeline.records.store import Store
from pipeline.records.workspace import SETTINGS_FILE, Workspace
from pipeline.vocabulary import Disposition, HoldCategory


@dataclass(frozen=True)
class Told:
    report: SendReport | None
    problem: str | None  # why nobody could be told (settings), in one line


def _disposition(value: str) -> Disposition:
    try:
        return Disposition(value)
    except ValueError:
        return Disposition.HELD  # an unknown stored word is shown as needing a person, never as released


def night_facts(ws: Workspace, store: Store, summary: NightSummary) -> NightFacts:
    """The night's summary with each lot's latest stored decision (categories and reasons as stored)."""
    latest = store.previous_decisions([o.lot_id for o in summary.outcomes])
    lots = []
    for outcome in summary.outcomes:
        stored = latest.get(outcome.lot_id)
        record = None if stored is None else stored.record
        lots.append(LotStanding(
            outcome.lot_id, outcome.product,
            _disposition(record.disposition if record else outcome.label),
            HoldCategory.in_reading_order(record.hold_categories if record else ()),
            tuple(record.reasons if record else outcome.reasons), outcome.new))
    return NightFacts(ws.plant_name, str(ws.root), summary.night_id, summary.received, summary.archived,
                      tuple((name, first_line(reason)) for name, reason in summary.quarantine_reasons),
                      tuple(lots), tuple(summary.notes), review_page(summary.night_id),
                      review_url(ws.desk_url, summary.night_id))


def tell(ws: Workspace, store: Store | None, message: NightMessage, night_id: int | None) -> Told:
    """Send ``message`` to the workspace's recipients (none configured: nothing); record it when the store answers."""
    if not ws.notify_urls:
        return Told(None, None)
    try:
        to = recipients(ws.notify_urls, ws.notify_secrets_file, str(ws.root / SETTINGS_FILE))
    except NotifyError as exc:
        return Told(None, str(exc))
    report = send(to, message.title, message.body)
    if store is not None:
        try:
            store.add_events([audit.event("night-notified", time_zone=ws.time_zone, night_id=night_id,
                                          failed_night=message.failed, title=message.title, sent=list(report.sent),
                                          not_sent=[{"to": t, "why": why} for t, why in report.failed])])
            audit.sync_log(store, ws.log)
        except (LotgateError, OSError):  # the store may be what failed tonight; the message went out regardless
            pass
    return Told(report, None)
