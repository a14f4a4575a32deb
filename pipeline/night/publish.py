"""Publishing the night's decisions: documents staged, decisions stored, then documents put in place.

A large night is rendered and signed across all cores in windows of WINDOW_LOTS lots, and each
window is one store transaction; a small night is rendered here and committed lot by lot. Per
window: its documents are written into the staging folder (``lot_documents``), its decisions,
results, chart points and audit events are committed (the first window also carries the limits
frozen tonight), and only then are its documents moved into place. A run stopped before a
window's commit leaves that window's documents staged: the restart removes them
(``pipeline/night/staging.py``) and decides those lots again, from the charts as the stopped
run saw them (``decide.load_charts``); one stopped after the commit has them moved into place.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from pipeline import __version__
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod, ProteinMethod, Specification
from pipeline.night.decide import BASELINE_REACHED
from pipeline.night.lot_documents import (
    WrittenDocuments,
    place_documents,
    render_documents,
    write_documents,
)
from pipeline.night.open import CertificateSigner
from pipeline.night.progress import Progress, no_progress
from pipeline.night.workers import process_pool, render, renderer_start
from pipeline.records import audit
from pipeline.records.chart_queries import active_limits
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite, LimitsWrite, StoredDecision
from pipeline.records.workspace import Workspace
from pipeline.release.change_note import change_note
from pipeline.release.decision import (
    ChartKey,
    FrozenLimits,
    LotDecision,
    NightDecisions,
    lot_documents,
)
from pipeline.release.dossier import build_dossier
from pipeline.release.records import DecisionRecord
from pipeline.release.signature import (
    signature_block,
    system_automatic_meaning,
    system_ready_meaning,
)
from pipeline.vocabulary import Disposition

WINDOW_LOTS = 64          # lots rendered per round: bounds memory whatever the night's size
PARALLEL_FROM_LOTS = 24   # below this, a process pool costs more than it saves
NIGHTLY_JOB = f"lotgate {__version__} (nightly job)"


@dataclass(frozen=True)
class Outcome:
    lot_id: str
    product: str
    label: str
    reasons: tuple[str, ...]
    revision: int
    new: bool
    certificate: str | None
    report: str | None


def _limits_to_store(ws: Workspace, store: Store, newly_frozen: dict[ChartKey, FrozenLimits]) -> tuple[LimitsWrite, ...]:
    """The first limits of each chart whose baseline was reached tonight, with their audit events.

    A chart that has limits in the store already got them from a stopped run of this night.
    """
    out = []
    for (chart, attribute), frozen in newly_frozen.items():
        if active_limits(store, chart, attribute) is not None:
            continue
        reason = f"baseline of {len(frozen.baseline_lots)} released lots reached"
        out.append(LimitsWrite(chart, attribute, frozen.center, frozen.sigma, frozen.mr_bar, frozen.baseline_lots,
                               BASELINE_REACHED, reason, (audit.event(
                                   "limits-frozen", time_zone=ws.time_zone, product=chart, attribute=attribute,
                                   center=frozen.center, sigma=frozen.sigma, mr_bar=frozen.mr_bar,
                                   baseline_lots=list(frozen.baseline_lots), by=BASELINE_REACHED, reason=reason),),
                               first_only=True))
    return tuple(out)


@dataclass(frozen=True)
class _Job:
    item: LotDecision
    revision: int
    previous: DecisionRecord | None
    stem: str
    decided_at: dt.datetime
    dossier: dict[str, Any]
    signature: dict[str, str] | None  # the visible signature block, for a released lot


class _Renderers:
    """Renders and signs documents in this process, or across all cores for a large night."""

    def __init__(self, ws: Workspace, signer: CertificateSigner, lots: int, workers: int | None):
        import os

        self.ws, self.signer = ws, signer
        cores = workers if workers is not None else (os.cpu_count() or 1)
        self.pool = None
        if cores > 1 and lots >= PARALLEL_FROM_LOTS:
            self.pool = process_pool(cores, renderer_start, (ws.plant_name, signer))
        self.window_lots = WINDOW_LOTS if self.pool is not None else 1

    def submit(self, jobs: list[_Job]) -> Any:
        """Start rendering ``jobs``; ``collect`` returns their documents in order."""
        payloads = [(job.dossier, job.signature) for job in jobs]
        if self.pool is None:
            return payloads
        return [self.pool.submit(render, payload) for payload in payloads]

    def collect(self, handle: Any) -> list[tuple[bytes, bytes | None]]:
        if self.pool is None:
            return [render_documents(d, sig, self.signer, self.ws.plant_name) for d, sig in handle]
        return [future.result() for future in handle]

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown()


def system_meaning(ws: Workspace, spec: Specification, disposition: Disposition) -> str:
    """What the system's signature on a nightly certificate means: prepared for approval, or released by exception."""
    version = spec.document.version
    if disposition == Disposition.RELEASED:
        return system_automatic_meaning(ws.plant_name, spec.product_code, version, spec.release_procedure or "?")
    return system_ready_meaning(ws.plant_name, spec.product_code, version)


def _prepare(ws: Workspace, catalog: Catalog, item: LotDecision, previous: StoredDecision | None,
             signer: CertificateSigner, revisions: tuple[dict[str, Any], ...] = ()) -> _Job:
    decision = item.decision
    revision = previous.revision + 1 if previous else 1
    spec, methods = lot_documents(item.evaluation, catalog)  # the versions the decision used
    activity_method = methods.get(spec.activity_method)
    protein_method = methods.get(spec.protein_method)
    decided_at = dt.datetime.now(dt.UTC)
    dossier = build_dossier(item, spec, activity_method if isinstance(activity_method, KineticMethod) else None,
                            protein_method if isinstance(protein_method, ProteinMethod) else None,
                            plant_name=ws.plant_name, time_zone=ws.time_zone, revision=revision,
                            decided_at=decided_at, revisions=revisions, decided_by=NIGHTLY_JOB)
    signature = None
    if decision.disposition in (Disposition.RELEASED, Disposition.READY_FOR_RELEASE):
        signature = signature_block(signer.signer_name, signer.fingerprint_sha256, decided_at.replace(microsecond=0),
                                    ws.time_zone, system_meaning(ws, spec, decision.disposition), system=True)
    return _Job(item, revision, None if previous is None else previous.record, f"{decision.lot_id}_r{revision}",
                decided_at, dossier, signature)


def _write(ws: Workspace, job: _Job, night_id: int, report_bytes: bytes, certificate_bytes: bytes | None,
           signer: CertificateSigner) -> tuple[DecisionWrite, Outcome, WrittenDocuments]:
    """Stage the lot's documents; return its decision record, results and audit events to store."""
    item, decision = job.item, job.item.decision
    written = write_documents(ws, job.stem, job.dossier, report_bytes, certificate_bytes, job.signature, signer)
    record = DecisionRecord.of(decision, item.evaluation.verdicts, revision=job.revision, night_id=night_id,
                               decided_at_utc=job.decided_at.isoformat(timespec="seconds"), trend=item.trend,
                               certificate=written.certificate, report=written.report)
    events = [audit.event("results-computed", time_zone=ws.time_zone, lot_id=decision.lot_id, night_id=night_id,
                          results=[{"code": v.code, "value": v.value, "se": v.se, "unit": v.unit,
                                    "reported": v.reported, "verdict": v.verdict} for v in item.evaluation.verdicts],
                          plates=list(item.evaluation.plates)),
              audit.event("decision", time_zone=ws.time_zone, **record.to_json())]
    if written.certificate is not None:
        events.append(audit.event("certificate-signed", time_zone=ws.time_zone, lot_id=decision.lot_id,
                                  **vars(written.certificate)))
    record_view = item.record
    if record_view is not None and (record_view.new_results or record_view.status_changes):
        events.append(audit.event(
            "lot-record", time_zone=ws.time_zone, lot_id=decision.lot_id, night_id=night_id,
            new_results=[{"attribute": r.attribute, "status": r.status, "verdict": r.verdict, "value": r.value,
                          "source": r.source, "files": r.files} for r in record_view.new_results],
            status_changes=[{"result_id": c.result_id, "attribute": c.attribute, "status": c.status,
                             "reason": c.reason} for c in record_view.status_changes]))
    write = DecisionWrite(
        record, NIGHTLY_JOB, night_id=night_id, manufactured_on=item.evaluation.manufactured_on,
        standard_errors={v.code: v.se for v in item.evaluation.verdicts}, chart_values=dict(item.chart_values),
        change_note=None if job.previous is None else change_note(job.previous, record),
        events=tuple(events), extra_points=tuple(item.extra_points),
        lot_results=() if record_view is None else record_view.new_results,
        status_changes=() if record_view is None else record_view.status_changes)
    outcome = Outcome(decision.lot_id, decision.product, decision.label, decision.reasons, job.revision, True,
                      None if written.certificate is None else f"certificates/{written.certificate.file}",
                      f"reports/{written.report.file}")
    return write, outcome, written


def publish(ws: Workspace, store: Store, catalog: Catalog, decided: NightDecisions, night_id: int,
            signer: CertificateSigner, progress: Progress = no_progress, workers: int | None = None,
            renderers: Any = None) -> list[Outcome]:
    """Per lot: batch report and (released) signed certificate staged; then the decisions, their
    results and their audit events in one store transaction (the first also stores the limits
    frozen tonight); then the documents moved into place; the log follows.

    ``renderers`` (a factory ``(ws, signer, lots) -> renderers``, as ``_Renderers``: submit, collect,
    close, window_lots) renders elsewhere, e.g. on other machines (flows/fanout.py); staging,
    storing and placing stay here, window by window, in the lots' order.
    """
    decisions = decided.lots
    known = store.known_fingerprints([d.decision.fingerprint for d in decisions])
    previous = store.previous_decisions([d.decision.lot_id for d in decisions])
    revisions: dict[str, list[dict[str, Any]]] = {}
    for stored in store.decisions_of_lots(sorted(previous)):
        revisions.setdefault(stored.lot_id, []).append({
            "revision": stored.revision, "decided_by": stored.decided_by, "label": stored.record.label,
            "decided_at_utc": stored.decided_at_utc.isoformat(timespec="seconds")})
    limits = _limits_to_store(ws, store, decided.newly_frozen)
    outcomes: dict[int, Outcome] = {}
    pending: list[tuple[int, LotDecision]] = []
    for index, item in enumerate(decisions):
        existing = known.get(item.decision.fingerprint)
        if existing is not None:
            outcomes[index] = Outcome(item.decision.lot_id, item.decision.product, existing.record.label,
                                      existing.record.reasons, existing.revision, False, None, None)
        else:
            pending.append((index, item))
    done = len(outcomes)
    progress("publish", done, len(decisions))
    renderers = (_Renderers(ws, signer, len(pending), workers) if renderers is None
                 else renderers(ws, signer, len(pending)))
    size = renderers.window_lots
    windows = [pending[start:start + size] for start in range(0, len(pending), size)]
    if not windows:
        store.add_decisions([], limits)

    def start(window: list[tuple[int, LotDecision]]) -> tuple[list[_Job], Any]:
        jobs = [_prepare(ws, catalog, item, previous.get(item.decision.lot_id), signer,
                         tuple(revisions.get(item.decision.lot_id, ()))) for _, item in window]
        return jobs, renderers.submit(jobs)

    try:
        running = start(windows[0]) if windows else None
        for number, window in enumerate(windows):
            jobs, handle = running
            # The next window renders on the workers while this one is written to disk and store.
            running = start(windows[number + 1]) if number + 1 < len(windows) else None
            written = [_write(ws, job, night_id, report, certificate, signer)
                       for job, (report, certificate) in zip(jobs, renderers.collect(handle), strict=True)]
            store.add_decisions([write for write, _, _ in written], limits if number == 0 else ())
            place_documents(ws, [documents for _, _, documents in written])
            for (index, _), (_, outcome, _) in zip(window, written, strict=True):
                outcomes[index] = outcome
            done += len(window)
            progress("publish", done, len(decisions))
            audit.sync_log(store, ws.log)
    finally:
        renderers.close()
    return [outcomes[i] for i in range(len(decisions))]
