"""One night of lot release, as stage functions the flow calls in order (adapter layer).

receive → assemble → evaluate → decide → publish → close. ``receive``, ``publish`` and
``close`` touch files, the store, the log and the signer; ``assemble``, ``evaluate`` and
``decide`` only compute. Each stage returns plain objects, so the same night runs as a Prefect
flow (flows/nightly.py) or as plain calls (benchmarks, tests).
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import json
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from pipeline import __version__, ledger
from pipeline.assembly import Assembly, QuarantinedFile, assemble
from pipeline.catalog import Catalog, load_catalog, schemas_dir
from pipeline.decide import CHART_TAIL, Chart, FrozenLimits, LotDecision, decide_night
from pipeline.dossier import build_dossier, local_time_text
from pipeline.errors import InputError, SigningError
from pipeline.ingest import ExportRejected, ParsedExport, parse_export
from pipeline.layouts import ExportLayout, load_layouts
from pipeline.lots import LotEvaluation, LotInputs, evaluate_lots
from pipeline.model import RELEASED
from pipeline.plates import (
    ActivityPlateResult,
    ProteinPlateResult,
    evaluate_activity_plate,
    evaluate_protein_plate,
)
from pipeline.specs import KineticMethod, ProteinMethod
from pipeline.store import Store
from pipeline.workspace import Workspace, atomic_write, move_into, open_workspace

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


def _quarantine(ws: Workspace, store: Store, intake: Intake, path: Path, sha: str, kind: str | None,
                status: str, report: str, text: str) -> None:
    target = move_into(path, ws.quarantine)
    atomic_write(target.with_name(target.name + ".reason.txt"), report.encode("utf-8"))
    store.record_file(intake.night_id, file_name=path.name, sha256=sha, kind=kind, layout_version=None,
                      status=status, reason=report.strip(), stored_as=str(target.relative_to(ws.root)))
    intake.quarantined.append(QuarantinedFile(path.name, sha, report.strip(), text))


def receive(ws: Workspace, store: Store, layouts: dict[str, ExportLayout], night_id: int,
            progress: Progress = _no_progress) -> Intake:
    """Read and validate every file in the inbox; set aside, with its reason, what cannot be used."""
    files = sorted(p for p in ws.inbox.iterdir() if p.is_file() and not p.name.startswith("."))
    intake = Intake(night_id=night_id, received=len(files))
    seen: dict[str, str] = {}
    for number, path in enumerate(files, start=1):
        data = path.read_bytes()
        sha = hashlib.sha256(data).hexdigest()
        text = data.decode("utf-8", errors="replace")
        earlier = store.known_file(sha)
        if earlier is not None or sha in seen:
            first = earlier.file_name if earlier is not None else seen[sha]
            when = f" (received {earlier.received_at_utc:%Y-%m-%d %H:%M} UTC)" if earlier is not None else " tonight"
            report = (f"File {path.name} was set aside (quarantined) and not used.\n\n- it is byte for byte "
                      f"identical (SHA-256 {sha[:16]}…) to {first}{when}, which was already processed\n")
            _quarantine(ws, store, intake, path, sha, None, "duplicate", report, "")
        else:
            try:
                parsed = parse_export(path.name, data, layouts)
            except ExportRejected as exc:
                _quarantine(ws, store, intake, path, sha, None, "quarantined", exc.report(), text)
            else:
                seen[sha] = path.name
                intake.parsed.append(parsed)
                intake.paths[path.name] = path
        progress("receive", number, len(files))
    return intake


# ------------------------------------------------------------------------------ evaluate
def evaluate(assembly: Assembly, catalog: Catalog) -> tuple[list[LotEvaluation], list[dict[str, Any]]]:
    """Plate suitability and per-well maths, then each lot's numbers and verdicts."""
    activity: dict[str, ActivityPlateResult] = {}
    protein: dict[str, ProteinPlateResult] = {}
    for plate_id, (frame, reads, method_id, _) in assembly.activity_plates.items():
        activity[plate_id] = evaluate_activity_plate(plate_id, frame, reads, catalog.kinetic_method(method_id))
    for plate_id, (frame, reads, method_id, _) in assembly.protein_plates.items():
        protein[plate_id] = evaluate_protein_plate(plate_id, frame, reads, catalog.protein_method(method_id))
    lots = []
    for lot in assembly.lots:
        spec = catalog.specifications[lot.product_code]
        problems = list(lot.problems)
        act = [p for p in activity.values() if lot.lot_id in p.activity or lot.lot_id in p.kinetics]
        pro = [p for p in protein.values() if lot.lot_id in p.protein]
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
    for product in sorted({e.product_code for e in evaluations}):
        spec = catalog.specifications[product]
        for attribute in (a for a in spec.attributes if a.trend):
            limits_row = store.active_limits(product, attribute.code)
            points = store.chart_points(product, attribute.code, tail=CHART_TAIL if limits_row else None)
            limits = None if limits_row is None else FrozenLimits(
                limits_row.version, limits_row.center, limits_row.sigma, limits_row.mr_bar,
                tuple(limits_row.baseline_lots))
            charts[(product, attribute.code)] = Chart(
                product, attribute.code, limits, [p.lot_id for p in points], [p.value for p in points],
                total=store.chart_count(product, attribute.code))
    return charts


def decide(evaluations: list[LotEvaluation], catalog: Catalog, charts: dict[tuple[str, str], Chart]) -> list[LotDecision]:
    ordered = sorted(evaluations, key=lambda e: (e.product_code, e.manufactured_on, e.lot_id))
    return decide_night(ordered, catalog.specifications, catalog.methods, charts, __version__)


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


def publish(ws: Workspace, store: Store, catalog: Catalog, decisions: list[LotDecision], night_id: int,
            charts: dict[tuple[str, str], Chart], signer: CertificateSigner,
            progress: Progress = _no_progress) -> list[Outcome]:
    """Per lot, in one transaction each: report, certificate (released), store, log."""
    from pipeline.documents.certificate import render_certificate
    from pipeline.documents.report import render_batch_report

    for chart in charts.values():
        if chart.newly_frozen is not None:
            frozen = chart.newly_frozen
            store.freeze_limits(chart.product_code, chart.attribute, frozen.center, frozen.sigma, frozen.mr_bar,
                                list(frozen.baseline_lots), frozen_by="lotgate (baseline reached)",
                                reason=f"baseline of {len(frozen.baseline_lots)} released lots reached")
            ledger.append(ws.log, [{"kind": "limits-frozen", "time_utc": _now_text(), "product": chart.product_code,
                                    "attribute": chart.attribute, "version": frozen.version, "center": frozen.center,
                                    "sigma": frozen.sigma, "baseline_lots": list(frozen.baseline_lots)}])
    outcomes = []
    for number, item in enumerate(decisions, start=1):
        decision = item.decision
        existing = store.decision_by_fingerprint(decision.fingerprint)
        if existing is not None:
            outcomes.append(Outcome(decision.lot_id, decision.product, existing.record.get("label", existing.disposition),
                                    tuple(existing.reasons), existing.revision, False, None, None))
            progress("publish", number, len(decisions))
            continue
        previous = store.latest_decision(decision.lot_id)
        revision = previous.revision + 1 if previous else 1
        spec = catalog.specifications[decision.product]
        activity_method = catalog.methods.get(spec.activity_method)
        protein_method = catalog.methods.get(spec.protein_method)
        decided_at = dt.datetime.now(dt.UTC)
        dossier = build_dossier(item, spec, activity_method if isinstance(activity_method, KineticMethod) else None,
                                protein_method if isinstance(protein_method, ProteinMethod) else None,
                                plant_name=ws.plant_name, time_zone=ws.time_zone, revision=revision,
                                decided_at=decided_at)
        stem = f"{decision.lot_id}_r{revision}"
        report_path = ws.reports / f"{stem}_batch-report.pdf"
        atomic_write(report_path, render_batch_report(dossier))
        certificate_path = None
        signature: dict[str, str] = {}
        if decision.disposition == RELEASED:
            signed_at = dt.datetime.now(dt.UTC).replace(microsecond=0)
            signature = {"signer_name": signer.signer_name,
                         "signed_at_local": local_time_text(signed_at, ws.time_zone),
                         "signed_at_utc": signed_at.isoformat(), "meaning": SIGNATURE_MEANING,
                         "certificate_fingerprint": signer.fingerprint_sha256}
            signed = signer.sign(render_certificate(dossier, signature), signed_at=signed_at,
                                 reason=SIGNATURE_MEANING, location=ws.plant_name)
            certificate_path = ws.certificates / f"{stem}_certificate.pdf"
            atomic_write(certificate_path, signed)
        record = {**decision.to_dict(), "label": decision.label, "revision": revision, "night_id": night_id,
                  "lot_id": decision.lot_id, "decided_at_utc": decided_at.isoformat(timespec="seconds"),
                  "results": [{"code": v.code, "value": v.value, "reported": v.reported, "unit": v.unit,
                               "verdict": v.verdict} for v in item.evaluation.verdicts],
                  "trend": [f.to_dict() for f in item.trend],
                  "certificate": None if certificate_path is None else {
                      "file": certificate_path.name, "sha256": hashlib.sha256(certificate_path.read_bytes()).hexdigest(),
                      "signer": signature.get("signer_name"), "meaning": SIGNATURE_MEANING},
                  "report": {"file": report_path.name, "sha256": hashlib.sha256(report_path.read_bytes()).hexdigest()}}
        store.add_decision(lot_id=decision.lot_id, product_code=decision.product,
                           manufactured_on=item.evaluation.manufactured_on, night_id=night_id,
                           decision=record, results=[v.to_dict() for v in item.evaluation.verdicts],
                           chart_values=item.chart_values, decided_by=f"lotgate {__version__} (nightly job)",
                           change_note=None if previous is None else "new input files or specification")
        ledger.append(ws.log, [{"kind": "decision", "time_utc": _now_text(), **record}])
        outcomes.append(Outcome(decision.lot_id, decision.product, decision.label, decision.reasons, revision, True,
                                None if certificate_path is None else str(certificate_path.relative_to(ws.root)),
                                str(report_path.relative_to(ws.root))))
        progress("publish", number, len(decisions))
    return outcomes


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
        from pipeline.signing import sign_pdf

        return sign_pdf(pdf, self.identity, reason=reason, location=location, signed_at=signed_at)


def _now_text() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


# ------------------------------------------------------------------------------ close
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")


def csv_cell(value: Any) -> str:
    """Text for a CSV cell that a spreadsheet will not run as a formula."""
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    text = str(value)
    return "'" + text if text.startswith(FORMULA_PREFIXES) else text


def write_lims_results(ws: Workspace, store: Store, night_id: int, outcomes: list[Outcome]) -> list[Path]:
    """Results for the LIMS: CSV and JSON plus a SHA-256 manifest, each written atomically."""
    rows = []
    for outcome in outcomes:
        if not outcome.new:
            continue
        row = store.latest_decision(outcome.lot_id)
        assert row is not None
        for result in row.record.get("results", []):
            rows.append({"lot_id": outcome.lot_id, "product_code": outcome.product, "attribute": result["code"],
                         "value": result["reported"], "unit": result["unit"], "verdict": result["verdict"],
                         "disposition": row.record["label"], "revision": row.revision,
                         "spec_version": row.spec_version})
    if not rows:
        return []
    header = list(rows[0])
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([csv_cell(row[h]) for h in header])
    stem = f"results-night-{night_id:04d}"
    csv_path, json_path = ws.lims / f"{stem}.csv", ws.lims / f"{stem}.json"
    csv_bytes = buffer.getvalue().encode("utf-8")
    json_bytes = json.dumps({"night_id": night_id, "code_version": __version__, "results": rows},
                            indent=1, ensure_ascii=False).encode("utf-8")
    atomic_write(csv_path, csv_bytes)
    atomic_write(json_path, json_bytes)
    manifest = "".join(f"{hashlib.sha256(b).hexdigest()}  {p.name}\n" for p, b in ((csv_path, csv_bytes), (json_path, json_bytes)))
    manifest_path = ws.lims / f"{stem}.sha256"
    atomic_write(manifest_path, manifest.encode())
    return [csv_path, json_path, manifest_path]


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
    for parsed in intake.parsed:
        path = intake.paths[parsed.file_name]
        target = move_into(path, archive)
        store.record_file(intake.night_id, file_name=parsed.file_name, sha256=parsed.sha256, kind=parsed.kind,
                          layout_version=parsed.layout_version, status="archived",
                          reason="; ".join(parsed.conversions) or None, stored_as=str(target.relative_to(ws.root)))
    lims_files = write_lims_results(ws, store, intake.night_id, outcomes)
    archived, quarantined = len(intake.parsed), len(intake.quarantined)
    store.finish_night(intake.night_id, files_received=intake.received, files_archived=archived,
                       files_quarantined=quarantined, lots_decided=sum(o.new for o in outcomes))
    ledger.append(ws.log, [{"kind": "night-closed", "time_utc": _now_text(), "night_id": intake.night_id,
                            "files_received": intake.received, "files_archived": archived,
                            "files_quarantined": quarantined, "lots_decided": sum(o.new for o in outcomes),
                            "quarantined": [{"file": q.file_name, "sha256": q.sha256} for q in intake.quarantined],
                            "not_decided": notes}])
    return NightSummary(intake.night_id, intake.received, archived, quarantined, outcomes, notes,
                        [(q.file_name, q.reason) for q in intake.quarantined], [str(p.relative_to(ws.root)) for p in lims_files])


def signer_for(ws: Workspace) -> IdentitySigner:
    """The workspace's signing identity: its own PKCS#12, or the demo identity when asked for."""
    from pipeline import signing

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


def open_catalog_and_layouts() -> tuple[Catalog, dict[str, ExportLayout]]:
    return load_catalog(), load_layouts(schemas_dir())


def workspace_paths_exist(ws: Workspace) -> bool:
    return ws.inbox.is_dir()


__all__ = ["receive", "assemble", "evaluate", "load_charts", "decide", "publish", "close", "Path"]


def assemble_intake(intake: Intake, catalog: Catalog) -> Assembly:
    """The night's parsed exports grouped by lot and plate (see pipeline.assembly)."""
    return assemble(intake.parsed, intake.quarantined, catalog)
