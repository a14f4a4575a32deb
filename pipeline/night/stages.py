"""One night of lot release, as stage functions the flow calls in order (adapter layer).

receive → assemble → evaluate → decide → publish → close. ``receive``, ``publish`` and
``close`` touch files, the store, the log and the signer; ``assemble``, ``evaluate`` and
``decide`` only compute. Each stage returns plain objects, so the same night runs as a Prefect
flow (flows/nightly.py) or as plain calls (benchmarks, tests).
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import hashlib
import io
import json
import os
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from pipeline import __version__
from pipeline.assay.plates import (
    ActivityPlateResult,
    ProteinPlateResult,
    evaluate_activity_plate,
    evaluate_protein_plate,
)
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import KineticMethod, ProteinMethod
from pipeline.errors import InputError, SigningError
from pipeline.intake.assembly import Assembly, QuarantinedFile, assemble
from pipeline.intake.layouts import ExportLayout, layout_for
from pipeline.intake.validation import ExportRejected, ParsedExport, parse_exports
from pipeline.records import audit
from pipeline.records.controlled_files import open_controlled_documents, sha256_file
from pipeline.records.store import DecisionWrite, Store
from pipeline.records.workspace import (
    Workspace,
    atomic_write,
    move_into,
    open_workspace,
    unique_target,
)
from pipeline.release.decision import CHART_TAIL, Chart, FrozenLimits, LotDecision, decide_night
from pipeline.release.dossier import build_dossier, local_time_text
from pipeline.release.lot_evaluation import LotEvaluation, LotInputs, evaluate_lots
from pipeline.vocabulary import RELEASED

Progress = Callable[[str, int, int], None]


def _no_progress(stage: str, done: int, total: int) -> None:
    return None


# ------------------------------------------------------------------------------ receive
@dataclass
class Intake:
    night_id: int
    received: int
    parsed: list[ParsedExport] = field(default_factory=list)
    paths: dict[str, Path] = field(default_factory=dict)
    quarantined: list[QuarantinedFile] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    carried: list[QuarantinedFile] = field(default_factory=list)  # set aside by an interrupted run


def _quarantine(ws: Workspace, store: Store, intake: Intake, path: Path, sha: str, status: str, report: str,
                text: str) -> None:
    """Move a file aside with its reason beside it, and record both in one transaction."""
    target = move_into(path, ws.quarantine)
    atomic_write(target.with_name(target.name + ".reason.txt"), report.encode("utf-8"))
    stored_as = str(target.relative_to(ws.root))
    store.record_files(intake.night_id, [dict(file_name=path.name, sha256=sha, kind=None, layout_version=None,
                                               status=status, reason=report.strip(), stored_as=stored_as)],
                       [audit.event("file-quarantined", time_zone=ws.time_zone, night_id=intake.night_id,
                                    file=path.name, sha256=sha, status=status, stored_as=stored_as,
                                    reason=report.strip())])
    intake.quarantined.append(QuarantinedFile(path.name, sha, report.strip(), text))


def receive(ws: Workspace, store: Store, layouts: dict[str, ExportLayout], night_id: int,
            progress: Progress = _no_progress, carried: list[QuarantinedFile] | None = None) -> Intake:
    """Read and validate every file in the inbox; set aside, with its reason, what cannot be used.

    Every entry of the inbox is counted: hidden files and symbolic links are set aside too (a
    link's target could change after it is archived); a folder is left in place and named.
    """
    entries = sorted(ws.inbox.iterdir())
    intake = Intake(night_id=night_id, received=0)
    intake.carried = list(carried or [])
    for entry in entries:
        if entry.is_dir() and not entry.is_symlink():
            intake.notes.append(f"the inbox holds a folder '{entry.name}'; lotgate reads files only, it was left in place")
    files = [e for e in entries if e.is_symlink() or e.is_file()]
    intake.received = len(files)
    largest = max(layout.max_bytes for layout in layouts.values())
    candidates: list[tuple[Path, str]] = []
    seen: dict[str, str] = {}
    done = 0
    for path in files:
        reason = None
        if path.is_symlink():
            reason = "it is a symbolic link; export the file itself into the inbox (a link's target can change later)"
        elif path.name.startswith("."):
            reason = "it is a hidden file (its name starts with '.'), not an export"
        else:
            layout = layout_for(path.name, layouts)
            limit = layout.max_bytes if layout is not None else largest
            size = path.stat().st_size
            if size > limit:
                reason = f"the file has {size:,} bytes; {'a ' + layout.kind + ' export' if layout else 'an export'} may have at most {limit:,}"
        if reason is not None:
            report = f"File {path.name} was set aside (quarantined) and not used.\n\n- {reason}\n"
            head = b""
            if not path.is_symlink():
                with open(path, "rb") as handle:  # the start only: enough to name the lots it mentions
                    head = handle.read(1 << 16)
            digest = (hashlib.sha256(os.readlink(path).encode()).hexdigest() if path.is_symlink()
                      else sha256_file(path))  # streamed: a large file is never held in memory
            _quarantine(ws, store, intake, path, digest, "quarantined", report, head.decode("utf-8", errors="replace"))
            done += 1
            progress("receive", done, len(files))
            continue
        candidates.append((path, sha256_file(path)))
    archived = store.archived_files([sha for _, sha in candidates])
    to_parse: list[tuple[Path, str]] = []
    for path, sha in candidates:
        earlier = archived.get(sha)
        if earlier is not None or sha in seen:
            first = earlier.file_name if earlier is not None else seen[sha]
            when = f" (received {earlier.received_at_utc:%Y-%m-%d %H:%M} UTC)" if earlier is not None else " tonight"
            report = (f"File {path.name} was set aside (quarantined) and not used.\n\n- it is byte for byte "
                      f"identical (SHA-256 {sha[:16]}…) to {first}{when}, which was already processed\n")
            # A copy of a file used tonight takes nothing away; a copy of an earlier night's file
            # may be what a lot needed, so its text links it to the lots it names.
            text = path.read_bytes().decode("utf-8", errors="replace") if earlier is not None else ""
            _quarantine(ws, store, intake, path, sha, "duplicate", report, text)
            done += 1
            progress("receive", done, len(files))
        else:
            seen[sha] = path.name
            to_parse.append((path, sha))
    received = []
    for chunk, results in _parse_in_chunks(to_parse, layouts):
        for (path, sha), result in zip(chunk, results, strict=True):
            if isinstance(result, ExportRejected):
                _quarantine(ws, store, intake, path, sha, "quarantined", result.report(),
                            path.read_bytes().decode("utf-8", errors="replace"))
            else:
                intake.parsed.append(result)
                intake.paths[path.name] = path
                received.append(audit.event("file-received", time_zone=ws.time_zone, night_id=night_id,
                                            file=path.name, sha256=sha, export_kind=result.kind,
                                            layout_version=result.layout_version, rows=len(result.frame),
                                            conversions=list(result.conversions)))
            done += 1
            progress("receive", done, len(files))
    store.add_events(received)
    audit.sync_log(store, ws.log)
    return intake


_WORKER: dict[str, Any] = {}  # a worker process's own state, set by its initializer

PARSE_CHUNK_FILES = 50        # files read and validated per call of parse_exports
PARALLEL_FROM_FILES = 100     # below this, worker processes cost more than they save


def process_pool(cores: int, initializer: Callable[..., None] | None = None,
                 initargs: tuple[Any, ...] = ()) -> Any:
    """Worker processes forked from a fresh server process that has imported lotgate once.

    A fork of the night's own process could inherit a lock held by one of the orchestrator's
    threads; the fork server is a clean process, and its forks start in milliseconds.
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(["pipeline.night.stages", "pipeline.documents.report", "pipeline.documents.certificate",
                                    "pipeline.records.signing"])
    return ProcessPoolExecutor(max_workers=cores, mp_context=context, initializer=initializer, initargs=initargs)


def _parser_start(layouts: dict[str, ExportLayout]) -> None:
    _WORKER["layouts"] = layouts
    _settle()


def _parse_files(paths: list[str]) -> list[ParsedExport | ExportRejected]:
    layouts = _WORKER["layouts"]
    return parse_exports([(Path(p).name, Path(p).read_bytes()) for p in paths], layouts)


def _parse_in_chunks(to_parse: list[tuple[Path, str]], layouts: dict[str, ExportLayout]) -> Any:
    """(chunk, verdicts) in the inbox's order; a large inbox is parsed across all cores.

    The tables come back to this process; the parsing's own working memory stays in the workers.
    """
    chunks = [to_parse[start:start + PARSE_CHUNK_FILES] for start in range(0, len(to_parse), PARSE_CHUNK_FILES)]
    cores = os.cpu_count() or 1
    if cores < 2 or len(to_parse) < PARALLEL_FROM_FILES:
        for chunk in chunks:
            yield chunk, parse_exports([(path.name, path.read_bytes()) for path, _ in chunk], layouts)
        return
    with process_pool(cores, _parser_start, (layouts,)) as pool:
        yield from zip(chunks, pool.map(_parse_files, [[str(path) for path, _ in chunk] for chunk in chunks]),
                       strict=True)


# ------------------------------------------------------------------------------ evaluate
def evaluate(assembly: Assembly, catalog: Catalog) -> tuple[list[LotEvaluation], list[dict[str, Any]]]:
    """Plate suitability and per-well maths, then each lot's numbers and verdicts."""
    activity: dict[str, ActivityPlateResult] = {}
    protein: dict[str, ProteinPlateResult] = {}
    # Each plate's tables are let go as soon as the plate is evaluated: the night's reads and its
    # results are then never all in memory at once. Only file names and checksums go on.
    for plate_id in list(assembly.activity_plates):
        frame, reads, method_id, _ = assembly.activity_plates.pop(plate_id)
        activity[plate_id] = evaluate_activity_plate(plate_id, frame, reads, catalog.kinetic_method(method_id))
    extinction = {lot.lot_id: catalog.specifications[lot.product_code].a280_extinction_ml_per_mg_per_cm
                  for lot in assembly.lots if catalog.specifications[lot.product_code].a280_extinction_ml_per_mg_per_cm}
    for plate_id in list(assembly.protein_plates):
        frame, reads, method_id, _ = assembly.protein_plates.pop(plate_id)
        protein[plate_id] = evaluate_protein_plate(plate_id, frame, reads, catalog.protein_method(method_id),
                                                   extinction)
    on_activity: dict[str, list[ActivityPlateResult]] = {}
    for plate in activity.values():
        for lot_id in set(plate.activity) | set(plate.kinetics):
            on_activity.setdefault(lot_id, []).append(plate)
    on_protein: dict[str, list[ProteinPlateResult]] = {}
    for plate in protein.values():
        for lot_id in plate.protein:
            on_protein.setdefault(lot_id, []).append(plate)
    lots = []
    for lot in assembly.lots:
        spec = catalog.specifications[lot.product_code]
        problems = list(lot.problems)
        act = on_activity.get(lot.lot_id, [])
        pro = on_protein.get(lot.lot_id, [])
        chosen_act = chosen_pro = None
        if len(act) > 1:
            problems.append(f"lot {lot.lot_id} is on {len(act)} activity plates ({', '.join(p.plate_id for p in act)}); "
                            "a re-assay must replace the earlier export, not add to it")
        elif act:
            chosen_act = act[0]
            if chosen_act.method_id != spec.activity_method:
                problems.append(f"plate {chosen_act.plate_id} uses method {chosen_act.method_id}; "
                                f"{spec.product_code} is specified with {spec.activity_method}")
                chosen_act = None
        if len(pro) > 1:
            problems.append(f"lot {lot.lot_id} is on {len(pro)} protein plates ({', '.join(p.plate_id for p in pro)})")
        elif pro:
            chosen_pro = pro[0]
        lots.append(LotInputs(lot.lot_id, lot.product_code, lot.manufactured_on, lot.assay_date, chosen_act, chosen_pro,
                              lot.lims, lot.input_files, tuple(problems)))
    plate_summaries = [p.summary() for p in (*activity.values(), *protein.values())]
    return evaluate_lots(lots, catalog.specifications, catalog.methods), plate_summaries


# ------------------------------------------------------------------------------ decide
def load_charts(store: Store, catalog: Catalog, evaluations: list[LotEvaluation]) -> dict[tuple[str, str], Chart]:
    """Read each chart's state once per night: frozen limits and the recent released lots."""
    charts: dict[tuple[str, str], Chart] = {}
    wanted: list[tuple[str, Any]] = []
    for product in sorted({e.product_code for e in evaluations}):
        wanted += [(product, a) for a in catalog.specifications[product].attributes if a.trend]
    for method_id in sorted({p.get("method_id") for e in evaluations for p in e.plates if p.get("kind") == "activity"}):
        method = catalog.methods.get(str(method_id))
        if isinstance(method, KineticMethod):
            wanted.append((method.method_id, method.recovery_attribute()))
    for product, attribute in wanted:
        limits_row = store.active_limits(product, attribute.code)
        points = store.chart_points(product, attribute.code, tail=CHART_TAIL if limits_row else None)
        limits = None if limits_row is None else FrozenLimits(
            limits_row.version, limits_row.center, limits_row.sigma, limits_row.mr_bar,
            tuple(limits_row.baseline_lots))
        charts[(product, attribute.code)] = Chart(
            product, attribute.code, limits, [p.lot_id for p in points], [p.value for p in points],
            total=store.chart_count(product, attribute.code))
    return charts


def earlier_decisions(store: Store, evaluations: list[LotEvaluation]) -> dict[str, str]:
    """For each lot decided before, a note on its latest decision (one query for the night)."""
    rows = store.previous_decisions([e.lot_id for e in evaluations])
    return {lot: f"revision {row.revision}: {row.record.get('label', row.disposition)} (decided by {row.decided_by})"
            for lot, row in rows.items()
            if row.disposition != RELEASED or not row.decided_by.startswith("lotgate")}


def decide(evaluations: list[LotEvaluation], catalog: Catalog, charts: dict[tuple[str, str], Chart],
           earlier: dict[str, str] | None = None) -> list[LotDecision]:
    ordered = sorted(evaluations, key=lambda e: (e.product_code, e.manufactured_on, e.lot_id))
    return decide_night(ordered, catalog.specifications, catalog.methods, charts, __version__, earlier or {})


# ------------------------------------------------------------------------------ publish
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


class CertificateSigner(Protocol):
    signer_name: str
    fingerprint_sha256: str

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str) -> bytes: ...


SIGNATURE_MEANING = ("Release of the lot: I have reviewed its results and the validity of the assays "
                     "behind them, and I approve its release against the stated specification")


def _freeze_new_limits(ws: Workspace, store: Store, charts: dict[tuple[str, str], Chart]) -> None:
    for chart in charts.values():
        if chart.newly_frozen is None:
            continue
        frozen = chart.newly_frozen
        reason = f"baseline of {len(frozen.baseline_lots)} released lots reached"
        store.freeze_limits(chart.product_code, chart.attribute, frozen.center, frozen.sigma, frozen.mr_bar,
                            list(frozen.baseline_lots), frozen_by="lotgate (baseline reached)", reason=reason,
                            events=[audit.event("limits-frozen", time_zone=ws.time_zone, product=chart.product_code,
                                                attribute=chart.attribute, center=frozen.center, sigma=frozen.sigma,
                                                mr_bar=frozen.mr_bar, baseline_lots=list(frozen.baseline_lots),
                                                by="lotgate (baseline reached)", reason=reason)])
        chart.newly_frozen = None


WINDOW_LOTS = 64          # lots rendered per round: bounds memory whatever the night's size
PARALLEL_FROM_LOTS = 24   # below this, a process pool costs more than it saves


@dataclass(frozen=True)
class _Job:
    item: LotDecision
    revision: int
    previous_record: dict[str, Any] | None
    stem: str
    decided_at: dt.datetime
    dossier: dict[str, Any]
    signature: dict[str, str] | None  # the visible signature block, for a released lot


def _render(dossier: dict[str, Any], signature: dict[str, str] | None, signer: CertificateSigner | None,
            location: str) -> tuple[bytes, bytes | None]:
    """Batch report, and for a released lot the certificate, rendered and signed (bytes only)."""
    from pipeline.documents.certificate import render_certificate
    from pipeline.documents.report import render_batch_report

    report = render_batch_report(dossier)
    if signature is None or signer is None:
        return report, None
    signed_at = dt.datetime.fromisoformat(signature["signed_at_utc"])
    certificate = signer.sign(render_certificate(dossier, signature), signed_at=signed_at,
                              reason=signature["meaning"], location=location)
    return report, certificate


def _worker_start(root: str) -> None:
    import logging

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    ws = open_workspace(Path(root))
    _WORKER["signer"] = signer_for(ws)
    _WORKER["location"] = ws.plant_name
    _settle()


def _settle() -> None:
    """Leave the objects a worker starts with (modules, fonts, keys) out of every garbage collection."""
    import gc

    gc.collect()
    gc.freeze()


def _worker_render(job: tuple[dict[str, Any], dict[str, str] | None]) -> tuple[bytes, bytes | None]:
    return _render(job[0], job[1], _WORKER["signer"], _WORKER["location"])


class _Renderers:
    """Renders and signs documents in this process, or across all cores for a large night."""

    def __init__(self, ws: Workspace, signer: CertificateSigner, lots: int, workers: int | None):
        import os

        self.ws, self.signer = ws, signer
        cores = workers if workers is not None else (os.cpu_count() or 1)
        self.pool = None
        if cores > 1 and lots >= PARALLEL_FROM_LOTS:
            self.pool = process_pool(cores, _worker_start, (str(ws.root),))

    def submit(self, jobs: list[_Job]) -> Any:
        """Start rendering ``jobs``; ``collect`` returns their documents in order."""
        payloads = [(job.dossier, job.signature) for job in jobs]
        if self.pool is None:
            return payloads
        return [self.pool.submit(_worker_render, payload) for payload in payloads]

    def collect(self, handle: Any) -> list[tuple[bytes, bytes | None]]:
        if self.pool is None:
            return [_render(d, sig, self.signer, self.ws.plant_name) for d, sig in handle]
        return [future.result() for future in handle]

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown()


def _prepare(ws: Workspace, catalog: Catalog, item: LotDecision, previous: Any, signer: CertificateSigner) -> _Job:
    decision = item.decision
    revision = previous.revision + 1 if previous else 1
    spec = catalog.specifications[decision.product]
    activity_method = catalog.methods.get(spec.activity_method)
    protein_method = catalog.methods.get(spec.protein_method)
    decided_at = dt.datetime.now(dt.UTC)
    dossier = build_dossier(item, spec, activity_method if isinstance(activity_method, KineticMethod) else None,
                            protein_method if isinstance(protein_method, ProteinMethod) else None,
                            plant_name=ws.plant_name, time_zone=ws.time_zone, revision=revision,
                            decided_at=decided_at)
    signature = None
    if decision.disposition == RELEASED:
        signed_at = decided_at.replace(microsecond=0)
        signature = {"signer_name": signer.signer_name, "signed_at_local": local_time_text(signed_at, ws.time_zone),
                     "signed_at_utc": signed_at.isoformat(), "meaning": SIGNATURE_MEANING,
                     "certificate_fingerprint": signer.fingerprint_sha256}
    return _Job(item, revision, None if previous is None else previous.record, f"{decision.lot_id}_r{revision}",
                decided_at, dossier, signature)


def _write_documents(ws: Workspace, job: _Job, night_id: int, report_bytes: bytes, certificate_bytes: bytes | None,
                     signer: CertificateSigner) -> tuple[DecisionWrite, Outcome]:
    """Write the lot's documents (atomic); return its decision, results and audit events to store."""
    item, decision = job.item, job.item.decision
    report_path = ws.reports / f"{job.stem}_batch-report.pdf"
    atomic_write(report_path, report_bytes, durable=False)
    atomic_write(ws.reports / f"{job.stem}_dossier.json",
                 json.dumps(job.dossier, ensure_ascii=False, sort_keys=True).encode("utf-8"), durable=False)
    certificate = None
    if certificate_bytes is not None and job.signature is not None:
        certificate_path = ws.certificates / f"{job.stem}_certificate.pdf"
        atomic_write(certificate_path, certificate_bytes)
        certificate = {"file": certificate_path.name, "sha256": hashlib.sha256(certificate_bytes).hexdigest(),
                       "signer": signer.signer_name, "signer_certificate_sha256": signer.fingerprint_sha256,
                       "signed_at_utc": job.signature["signed_at_utc"], "meaning": SIGNATURE_MEANING}
    events = [audit.event("results-computed", time_zone=ws.time_zone, lot_id=decision.lot_id, night_id=night_id,
                          results=[{"code": v.code, "value": v.value, "se": v.se, "unit": v.unit,
                                    "reported": v.reported, "verdict": v.verdict} for v in item.evaluation.verdicts],
                          plates=list(item.evaluation.plates))]
    record = {**decision.to_dict(), "label": decision.label, "revision": job.revision, "night_id": night_id,
              "decided_at_utc": job.decided_at.isoformat(timespec="seconds"),
              "results": [{"code": v.code, "value": v.value, "reported": v.reported, "unit": v.unit,
                           "verdict": v.verdict} for v in item.evaluation.verdicts],
              "trend": [f.to_dict() for f in item.trend], "certificate": certificate,
              "report": {"file": report_path.name, "sha256": hashlib.sha256(report_bytes).hexdigest()}}
    events.append(audit.event("decision", time_zone=ws.time_zone, **record))
    if certificate is not None:
        events.append(audit.event("certificate-signed", time_zone=ws.time_zone, lot_id=decision.lot_id, **certificate))
    write = DecisionWrite(
        lot_id=decision.lot_id, product_code=decision.product, manufactured_on=item.evaluation.manufactured_on,
        night_id=night_id, decision=record, results=tuple(v.to_dict() for v in item.evaluation.verdicts),
        chart_values=dict(item.chart_values), decided_by=f"lotgate {__version__} (nightly job)",
        change_note=None if job.previous_record is None else _change_note(job.previous_record, record),
        events=tuple(events), extra_points=tuple(item.extra_points))
    outcome = Outcome(decision.lot_id, decision.product, decision.label, decision.reasons, job.revision, True,
                      None if certificate is None else f"certificates/{certificate['file']}",
                      str(report_path.relative_to(ws.root)))
    return write, outcome


def publish(ws: Workspace, store: Store, catalog: Catalog, decisions: list[LotDecision], night_id: int,
            charts: dict[tuple[str, str], Chart], signer: CertificateSigner,
            progress: Progress = _no_progress, workers: int | None = None) -> list[Outcome]:
    """Per lot: batch report and (released) signed certificate written atomically; then the
    decisions, their results and their audit events in one store transaction; the log follows.

    A large night is rendered and signed across all cores in windows of WINDOW_LOTS lots, and
    each window is one transaction; a small night is rendered here and committed lot by lot.
    The store and the log are written here, in the lots' order. A run killed mid-window leaves
    that window's documents without decisions: the restart decides those lots again and
    overwrites the documents (same revision, same file names).
    """
    _freeze_new_limits(ws, store, charts)
    audit.sync_log(store, ws.log)
    known = store.known_fingerprints([d.decision.fingerprint for d in decisions])
    previous = store.previous_decisions([d.decision.lot_id for d in decisions])
    outcomes: dict[int, Outcome] = {}
    pending: list[tuple[int, LotDecision]] = []
    for index, item in enumerate(decisions):
        existing = known.get(item.decision.fingerprint)
        if existing is not None:
            outcomes[index] = Outcome(item.decision.lot_id, item.decision.product,
                                      existing.record.get("label", existing.disposition), tuple(existing.reasons),
                                      existing.revision, False, None, None)
        else:
            pending.append((index, item))
    done = len(outcomes)
    progress("publish", done, len(decisions))
    renderers = _Renderers(ws, signer, len(pending), workers)
    # One store transaction per window: a large night renders on the workers in windows of
    # WINDOW_LOTS lots; a small one renders here, and commits lot by lot.
    size = WINDOW_LOTS if renderers.pool is not None else 1
    windows = [pending[start:start + size] for start in range(0, len(pending), size)]

    def start(window: list[tuple[int, LotDecision]]) -> tuple[list[_Job], Any]:
        jobs = [_prepare(ws, catalog, item, previous.get(item.decision.lot_id), signer) for _, item in window]
        return jobs, renderers.submit(jobs)

    try:
        running = start(windows[0]) if windows else None
        for number, window in enumerate(windows):
            jobs, handle = running
            # The next window renders on the workers while this one is written to disk and store.
            running = start(windows[number + 1]) if number + 1 < len(windows) else None
            written = [_write_documents(ws, job, night_id, report, certificate, signer)
                       for job, (report, certificate) in zip(jobs, renderers.collect(handle), strict=True)]
            store.add_decisions([write for write, _ in written])
            for (index, _), (_, outcome) in zip(window, written, strict=True):
                outcomes[index] = outcome
            done += len(window)
            progress("publish", done, len(decisions))
            audit.sync_log(store, ws.log)
    finally:
        renderers.close()
    return [outcomes[i] for i in range(len(decisions))]


def _change_note(before: dict[str, Any], after: dict[str, Any]) -> str:
    """What differs between two revisions: input files, specification, results, disposition."""
    notes = []
    old_files, new_files = before.get("input_files", {}), after.get("input_files", {})
    added = sorted(set(new_files) - set(old_files))
    removed = sorted(set(old_files) - set(new_files))
    changed = sorted(n for n in set(old_files) & set(new_files) if old_files[n] != new_files[n])
    if added:
        notes.append(f"new input files {', '.join(added)}")
    if removed:
        notes.append(f"input files no longer used {', '.join(removed)}")
    if changed:
        notes.append(f"changed content of {', '.join(changed)}")
    if before.get("spec_version") != after.get("spec_version"):
        notes.append(f"specification v{before.get('spec_version')} → v{after.get('spec_version')}")
    old_results = {r["code"]: r.get("reported") for r in before.get("results", [])}
    moved = [f"{r['code']} {old_results.get(r['code'])} → {r.get('reported')}" for r in after.get("results", [])
             if r["code"] in old_results and old_results[r["code"]] != r.get("reported")]
    if moved:
        notes.append("results changed: " + "; ".join(moved))
    if before.get("label") != after.get("label"):
        notes.append(f"disposition {before.get('label')} → {after.get('label')}")
    return "; ".join(notes) or "re-evaluated with the same numbers"


@dataclass(frozen=True)
class IdentitySigner:
    """Signs certificates with a loaded identity (see pipeline.signing)."""

    identity: Any

    @property
    def signer_name(self) -> str:
        return str(self.identity.signer_name)

    @property
    def fingerprint_sha256(self) -> str:
        return str(self.identity.fingerprint_sha256)

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str) -> bytes:
        from pipeline.records.signing import sign_pdf

        return sign_pdf(pdf, self.identity, reason=reason, location=location, signed_at=signed_at)


def _now_text() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


# ------------------------------------------------------------------------------ close
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"-?[0-9]+(\.[0-9]+)?([eE][-+]?[0-9]+)?")


def csv_cell(value: Any) -> str:
    """Text for a CSV cell that a spreadsheet will not run as a formula."""
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    text = str(value)
    if _PLAIN_NUMBER.fullmatch(text):
        return text
    return "'" + text if text.startswith(FORMULA_PREFIXES) else text


def write_lims_results(ws: Workspace, store: Store) -> list[Path]:
    """Every decision not yet exported, as CSV and JSON plus a SHA-256 manifest (atomic writes).

    The file names come from the first and last decision exported, so a night re-run after a
    crash writes the same bytes to the same names, and a night with nothing new writes nothing.
    """
    pending = store.unexported_decision_ids()
    if not pending:
        return []
    rows = []
    for start in range(0, len(pending), 500):  # 500 decision records at a time: a large night's would fill memory
        for decision in store.decisions_by_id(pending[start:start + 500]):
            for result in decision.record.get("results", []):
                rows.append({"lot_id": decision.lot_id, "product_code": decision.record.get("product"),
                             "attribute": result["code"], "value": result["reported"], "unit": result["unit"],
                             "verdict": result["verdict"],
                             "disposition": decision.record.get("label", decision.disposition),
                             "revision": decision.revision, "spec_version": decision.spec_version,
                             "decided_at_utc": decision.record.get("decided_at_utc")})
    header = list(rows[0])
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([csv_cell(row[h]) for h in header])
    stem = f"results-{pending[0]:06d}-{pending[-1]:06d}"
    csv_path, json_path = ws.lims / f"{stem}.csv", ws.lims / f"{stem}.json"
    csv_bytes = buffer.getvalue().encode("utf-8")
    # One result per line (json's indenting encoder is pure Python, ten times slower than this).
    json_text = (f'{{"code_version": {json.dumps(__version__)}, "decisions": {json.dumps(pending)}, '
                 f'"results": [\n' + ",\n".join(json.dumps(row, ensure_ascii=False) for row in rows) + "\n]}\n")
    json_bytes = json_text.encode("utf-8")
    manifest = "".join(f"{hashlib.sha256(b).hexdigest()}  {p.name}\n"
                       for p, b in ((csv_path, csv_bytes), (json_path, json_bytes))).encode()
    manifest_path = ws.lims / f"{stem}.sha256"
    written = []
    for path, data in ((csv_path, csv_bytes), (json_path, json_bytes), (manifest_path, manifest)):
        if not (path.exists() and path.read_bytes() == data):
            atomic_write(path, data)
        written.append(path)
    store.mark_exported(pending, stem, [audit.event(
        "lims-results-written", time_zone=ws.time_zone, files={p.name: hashlib.sha256(p.read_bytes()).hexdigest()
                                                                for p in written},
        decisions=len(pending), rows=len(rows))])
    return written


@dataclass(frozen=True)
class NightSummary:
    night_id: int
    received: int
    archived: int
    quarantined: int
    outcomes: list[Outcome]
    notes: list[str]
    quarantine_reasons: list[tuple[str, str]]
    lims_files: list[str]


def close(ws: Workspace, store: Store, intake: Intake, outcomes: list[Outcome], notes: list[str]) -> NightSummary:
    """Archive the used files, write the LIMS results, and count: received = archived + quarantined."""
    archive = ws.archive / f"night-{intake.night_id:04d}"
    files, events, moves = [], [], []
    for parsed in intake.parsed:
        target = unique_target(archive, parsed.file_name)
        stored_as = str(target.relative_to(ws.root))
        files.append(dict(file_name=parsed.file_name, sha256=parsed.sha256, kind=parsed.kind,
                          layout_version=parsed.layout_version, status="archived",
                          reason="; ".join(parsed.conversions) or None, stored_as=stored_as))
        events.append(audit.event("file-archived", time_zone=ws.time_zone, night_id=intake.night_id,
                                  file=parsed.file_name, sha256=parsed.sha256, stored_as=stored_as))
        moves.append((intake.paths[parsed.file_name], target))
    # Recorded first, moved after: a run killed in between finishes the moves when it restarts.
    store.record_files(intake.night_id, files, events)
    for source, target in moves:
        os.replace(source, target)
    lims_files = write_lims_results(ws, store)
    archived, quarantined = len(intake.parsed), len(intake.quarantined)
    decided = sum(o.new for o in outcomes)
    store.finish_night(intake.night_id, files_received=intake.received, files_archived=archived,
                       files_quarantined=quarantined, lots_decided=decided)
    store.add_events([audit.event("night-closed", time_zone=ws.time_zone, night_id=intake.night_id,
                                  files_received=intake.received, files_archived=archived,
                                  files_quarantined=quarantined, lots_decided=decided, not_decided=notes)])
    audit.sync_log(store, ws.log)
    return NightSummary(intake.night_id, intake.received, archived, quarantined, outcomes, notes,
                        [(q.file_name, q.reason) for q in intake.quarantined],
                        [str(p.relative_to(ws.root)) for p in lims_files])


def signer_for(ws: Workspace) -> IdentitySigner:
    """The workspace's signing identity: its own PKCS#12, or the demo identity when asked for."""
    from pipeline.records import signing

    settings_demo = ws.signing_p12 is None and (ws.keys / "use-demo-identity").exists()
    if ws.signing_p12 is not None:
        return IdentitySigner(signing.load_identity(ws.signing_p12, passphrase_file=ws.signing_passphrase_file))
    if settings_demo:
        demo = signing.create_demo_identity(ws.keys, ws.plant_name, ws.signer_name)
        return IdentitySigner(signing.load_identity(demo.p12_path, passphrase_file=demo.passphrase_path))
    raise SigningError(
        f"no signing identity is set up for the workspace {ws.root}: put 'signing: {{p12: FILE, passphrase_file: FILE}}' "
        f"in {ws.root / 'workspace.yaml'} (or set LOTGATE_SIGNING_PASSPHRASE), or run 'lotgate keys demo --workspace {ws.root}' "
        "for a demo identity")


def open_night(root: Path) -> tuple[Workspace, Store, IdentitySigner]:
    """Open the workspace, its store and its signer; fail before any file is touched."""
    ws = open_workspace(root)
    if not ws.inbox.is_dir():
        raise InputError(f"{ws.inbox} does not exist: the workspace needs an inbox/ folder with tonight's exports")
    ws.make_folders()
    signer = signer_for(ws)
    store = Store(ws.database_url)
    return ws, store, signer


@dataclass(frozen=True)
class Recovery:
    notes: list[str]
    quarantined: list[QuarantinedFile]  # set aside by the interrupted night: still tonight's evidence


def recover_interrupted(ws: Workspace, store: Store) -> Recovery:
    """Finish what a killed run left: archive moves, unrecorded quarantined files, temporary files.

    Decisions need no mending: each was committed with its audit events in one transaction, and
    a lot whose fingerprint is stored is not decided again. The files the interrupted night set
    aside are handed on, so that the lots they name see the same inputs (and fingerprints) as
    they would have in one uninterrupted run.
    """
    notes: list[str] = []
    for folder in (ws.root, ws.inbox, ws.certificates, ws.reports, ws.lims, ws.archive, ws.quarantine):
        for stale in folder.glob(".*.tmp"):
            stale.unlink(missing_ok=True)
    unfinished = store.unfinished_nights()
    if not unfinished:
        return Recovery(notes, [])
    earliest = min(n.started_at_utc for n in unfinished).timestamp()
    recorded = {(f.file_name, f.stored_as) for f in store.files_of_nights([n.id for n in unfinished])}
    for row in store.files_of_nights([n.id for n in unfinished]):
        if row.status != "archived":
            continue
        target, source = ws.root / row.stored_as, ws.inbox / row.file_name
        if not target.exists() and source.exists() and sha256_file(source) == row.sha256:
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(source, target)
            notes.append(f"finished archiving {row.file_name}, left in the inbox by an interrupted run")
    aside = []
    for path in sorted(ws.quarantine.iterdir()):
        if path.name.endswith(".reason.txt") or not path.is_file() or path.stat().st_mtime < earliest - 1:
            continue
        stored_as = str(path.relative_to(ws.root))
        if any(stored == stored_as for _, stored in recorded):
            continue
        reason_file = path.with_name(path.name + ".reason.txt")
        reason = reason_file.read_text(encoding="utf-8") if reason_file.exists() else \
            f"File {path.name} was set aside by a run that was interrupted before it recorded why.\n"
        if not reason_file.exists():
            atomic_write(reason_file, reason.encode("utf-8"))
        aside.append((path, reason))
    night_id = unfinished[-1].id
    for path, reason in aside:
        digest, stored_as = sha256_file(path), str(path.relative_to(ws.root))
        store.record_files(night_id, [dict(file_name=path.name, sha256=digest, kind=None, layout_version=None,
                                           status="quarantined", reason=reason.strip(), stored_as=stored_as)],
                           [audit.event("file-quarantined", time_zone=ws.time_zone, night_id=night_id,
                                        file=path.name, sha256=digest, status="quarantined", stored_as=stored_as,
                                        reason=reason.strip(), recovered=True)])
        notes.append(f"recorded {path.name}, set aside by an interrupted run")
    for night_run in unfinished:
        store.finish_night(night_run.id)
        store.add_events([audit.event("night-interrupted", time_zone=ws.time_zone, night_id=night_run.id,
                                      started_utc=night_run.started_at_utc.isoformat())])
        notes.append(f"night {night_run.id} had been interrupted; its decisions stand and this run completes it")
    carried = []
    for row in store.files_of_nights([n.id for n in unfinished]):
        if row.status not in ("quarantined", "duplicate"):
            continue
        path = ws.root / row.stored_as
        text = ""
        earlier_copy = row.status == "duplicate" and "tonight" not in (row.reason or "")
        if (row.status == "quarantined" or earlier_copy) and path.is_file() and not path.is_symlink():
            with open(path, "rb") as handle:
                text = handle.read(1 << 16).decode("utf-8", errors="replace")
        carried.append(QuarantinedFile(row.file_name, row.sha256, row.reason or "", text))
    audit.sync_log(store, ws.log)
    return Recovery(notes, carried)


def open_catalog_and_layouts(ws: Workspace | None = None) -> tuple[Catalog, dict[str, ExportLayout]]:
    return open_controlled_documents(ws)






def assemble_intake(intake: Intake, catalog: Catalog) -> Assembly:
    """The night's parsed exports grouped by lot and plate (see pipeline.assembly)."""
    assembly = assemble(intake.parsed, [*intake.carried, *intake.quarantined], catalog)
    assembly.notes[:0] = intake.notes
    # Keep names, not rows: a copied empty table, since an empty slice would still hold the rows' memory.
    intake.parsed = [dataclasses.replace(p, frame=p.frame.iloc[0:0].copy()) for p in intake.parsed]
    return assembly
