"""The nightly lot-release flow: Prefect tasks, one per stage, thin around ``pipeline.night``'s use cases.

Tasks are coarse (a stage each, the per-lot maths vectorised inside) so orchestration stays
cheap; results are kept in memory (no caching, no persistence of task results).
"""

from __future__ import annotations

import resource
import time
from collections.abc import Callable
from contextlib import nullcontext
from pathlib import Path

from prefect import flow, get_run_logger, task
from prefect.cache_policies import NONE
from prefect.utilities.annotations import quote

from pipeline import __version__
from pipeline.errors import LotgateError
from pipeline.night.close import NightSummary
from pipeline.night.decide import decide as decide_lots
from pipeline.night.decide import earlier_decisions, lot_records
from pipeline.night.decide import load_charts as read_charts
from pipeline.night.evaluate import evaluate as evaluate_lots
from pipeline.night.night_message import NightFacts, NightMessage, failure_message, night_message
from pipeline.night.night_notice import Told, night_facts, tell
from pipeline.night.open import CertificateSigner, open_night
from pipeline.night.read_formats import set_aside_undeclared_formats
from pipeline.night.receive import assemble_intake, check_folders_writable
from pipeline.night.release_modes import with_release_modes
from pipeline.night.reread import reread_plates
from pipeline.night.retryable import (
    close_unless_recorded,
    open_night_records,
    publish_settled,
    receive_unless_recorded,
)
from pipeline.records import audit
from pipeline.records.controlled_files import open_controlled_documents
from pipeline.records.run_lock import RunLocked, run_lock
from pipeline.records.store import Store
from pipeline.records.transient import is_transient
from pipeline.records.workspace import Workspace, open_workspace
from pipeline.records.workspace_id import workspace_id

_PROGRESS: dict[str, Callable[[str, int, int], None]] = {}


def set_progress(callback: Callable[[str, int, int], None] | None) -> None:
    """Register the command line's progress display (kept out of flow parameters)."""
    _PROGRESS.clear()
    if callback is not None:
        _PROGRESS["cb"] = callback


def _progress(stage: str, done: int, total: int) -> None:
    callback = _PROGRESS.get("cb")
    if callback is not None:
        callback(stage, done, total)


def _transient_only(_task, _task_run, state) -> bool:
    """Retry an I/O task only for a failure that may pass (a dropped connection, a stalled share)."""
    return is_transient(getattr(state, "data", None))


# Retries with back-off on the I/O stages only (store, workspace folders, network share); the
# computation (assemble, evaluate, decide) is never retried: it would fail the same way again.
# Each retried stage is safe to run again (pipeline/night/retryable.py).
RETRIES = 3
RETRY_DELAYS_S = [5, 20, 60]
_IO = dict(cache_policy=NONE, persist_result=False, retries=RETRIES, retry_delay_seconds=RETRY_DELAYS_S,
           retry_jitter_factor=0.2, retry_condition_fn=_transient_only)
_COMPUTE = dict(cache_policy=NONE, persist_result=False)

open_records = task(open_night_records, name="recover earlier nights, open tonight's", **_IO)
receive = task(receive_unless_recorded, name="receive exports", **_IO)
assemble = task(assemble_intake, name="assemble lots", **_COMPUTE)
reread = task(reread_plates, name="re-read plates on record", **_IO)
evaluate = task(evaluate_lots, name="compute results", **_COMPUTE)
load_charts = task(read_charts, name="read control charts", **_IO)
decide = task(decide_lots, name="trend and disposition", **_COMPUTE)
publish = task(publish_settled, name="reports, certificates, store, log", **_IO)
close = task(close_unless_recorded, name="archive and LIMS results", **_IO)
STAGES = ("open_records", "receive", "assemble", "reread", "evaluate", "load_charts", "decide", "publish", "close")


def run_stages(ws: Workspace, store: Store, signer: CertificateSigner, *, orchestrated: bool = True,
               lock: bool = True) -> NightSummary:
    """The night's stages in order, as Prefect tasks (default) or as plain function calls.

    Holds the night's run lock unless the caller already holds it (``lock=False``).
    """
    step = {name: (globals()[name].fn if not orchestrated else globals()[name]) for name in STAGES}
    if not lock:
        return _stages(ws, store, signer, step, orchestrated)
    with run_lock(ws.root, store):
        return _stages(ws, store, signer, step, orchestrated)


def _release_free_memory() -> None:
    """Hand the heap's free pages back to the system (glibc), so the next stage starts lean.

    A large night frees most of its parsed tables and intermediate results between stages;
    without this, the process keeps them as free but resident memory.
    """
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):  # not glibc: nothing to do
        pass


STAGE_SECONDS: dict[str, float] = {}  # wall time of each stage of the last night in this process
STAGE_PEAK_MB: dict[str, float] = {}  # this process's peak resident memory at the end of each stage
CURRENT_NIGHT: dict[str, int] = {}  # the id of the night this process is running ("id"), once started


def _stages(ws: Workspace, store: Store, signer: CertificateSigner, step: dict,
            orchestrated: bool) -> NightSummary:
    STAGE_SECONDS.clear()
    STAGE_PEAK_MB.clear()
    CURRENT_NIGHT.clear()

    def timed(name: str, *args):
        start = time.perf_counter()
        try:
            # quote(): Prefect would otherwise walk every nested object of a night's data
            # looking for upstream futures, which costs seconds on a large night.
            return step[name](*(quote(a) for a in args)) if orchestrated else step[name](*args)
        finally:
            if name in ("assemble", "evaluate", "publish"):
                _release_free_memory()
            STAGE_SECONDS[name] = time.perf_counter() - start
            STAGE_PEAK_MB[name] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0

    catalog, layouts = open_controlled_documents(ws)
    catalog = with_release_modes(catalog, ws)
    identity = workspace_id(ws.root)
    store.check_workspace(identity, shared=ws.store_shared)  # another workspace's store: refused before any move
    check_folders_writable(ws)
    recovered, night_id = timed("open_records", ws, store, identity, __version__)
    CURRENT_NIGHT["id"] = night_id
    intake = timed("receive", ws, store, layouts, night_id, _progress, recovered.quarantined)
    set_aside_undeclared_formats(ws, store, intake, catalog)
    assembly = timed("assemble", intake, catalog)
    earlier_plates = timed("reread", ws, store, catalog, layouts, assembly)  # a lot's other plate, from its record
    evaluations, _plates = timed("evaluate", assembly, catalog, earlier_plates)
    charts = timed("load_charts", store, catalog, evaluations)
    records = lot_records(store, catalog, evaluations, ws.time_zone, ws.site_id())  # with the lots decided again from them
    decided = timed("decide", evaluations, catalog, charts, earlier_decisions(store, [*evaluations, *records.rechecks]),
                    records)
    fan_out = None
    if orchestrated and ws.fan_out_deployment is not None:
        from flows.fanout import renderers_for

        fan_out = renderers_for(ws, night_id)
    outcomes = timed("publish", ws, store, catalog, decided, night_id, signer, _progress, fan_out)
    summary = timed("close", ws, store, intake, outcomes, [*recovered.notes, *assembly.notes], signer)
    from flows.desk.static_page import write_night_page

    write_night_page(ws, store, summary.night_id)  # the night's review page, after its records
    return summary


@flow(name="lotgate-night", log_prints=False, persist_result=False)
def nightly(workspace: str, lock_held_by_caller: bool = False) -> NightSummary:
    """One night: every export in ``workspace/inbox`` to decisions, documents and records.

    At its end the workspace's recipients are told (``notify:`` in workspace.yaml) and the summary
    is published as Prefect artifacts. A night that fails is recorded (a ``night-failed`` audit
    event, when the store answers and the night still holds its lock), its recipients are told,
    and the failure is raised again so that Prefect marks the run failed; the next run recovers it.
    """
    ws = store = None
    CURRENT_NIGHT.clear()
    try:
        ws, store, signer = open_night(Path(workspace))
        with nullcontext() if lock_held_by_caller else run_lock(ws.root, store):
            try:
                summary = run_stages(ws, store, signer, orchestrated=True, lock=False)
            except Exception as exc:
                record_failure(ws, store, exc)
                raise
            _after_night(ws, store, summary)
            return summary
    except Exception as exc:
        tell_failure(Path(workspace), ws, store, exc)
        raise


def _after_night(ws: Workspace, store: Store, summary: NightSummary) -> None:
    """Artifacts and the end-of-night message; the night's records are complete, so nothing here fails it."""
    try:
        facts = night_facts(ws, store, summary)
        message = night_message(facts)
        publish_artifacts(facts, message)
        _warn_untold(tell(ws, store, message, summary.night_id))
    except Exception as exc:  # noqa: BLE001 (a summary that cannot be made or shown is reported, never a failed night)
        get_run_logger().error("night %s is complete, but its summary could not be published or sent: %s",
                               summary.night_id, _one_line(exc))


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or exc.__class__.__name__
    return text if isinstance(exc, LotgateError) else f"{exc.__class__.__name__}: {text}"


def record_failure(ws: Workspace, store: Store, exc: BaseException) -> None:
    """A ``night-failed`` audit event, under the night's lock, unless the lock was lost or the store is down."""
    night_id = CURRENT_NIGHT.get("id")
    if night_id is None or isinstance(exc, RunLocked):
        return
    try:
        store.add_events([audit.event("night-failed", time_zone=ws.time_zone, night_id=night_id,
                                      why=_one_line(exc)[:2000])])
        audit.sync_log(store, ws.log)
    except (LotgateError, OSError) as unrecorded:  # the store is what failed: the next run records the interruption
        get_run_logger().warning("the failure of night %s could not be recorded now (%s); the next run records "
                                 "it as interrupted", night_id, _one_line(unrecorded))


def tell_failure(root: Path, ws: Workspace | None, store: Store | None, exc: BaseException) -> None:
    """Send the failure message when the workspace's settings can be read (they name the recipients)."""
    try:
        ws = ws or open_workspace(root)
    except LotgateError:
        get_run_logger().error("night failed and nobody could be told: the settings of %s cannot be read", root)
        return
    night_id = CURRENT_NIGHT.get("id")
    usable_store = None if isinstance(exc, RunLocked) else store
    message = failure_message(ws.plant_name, str(ws.root), night_id, _one_line(exc), ws.desk_url)
    _warn_untold(tell(ws, usable_store, message, night_id))


def _warn_untold(told: Told) -> None:
    logger = get_run_logger()
    if told.problem:
        logger.error("nobody was told about this night: %s", told.problem)
    if told.report is not None:
        for template, why in told.report.failed:
            logger.warning("not told: %s (%s)", _host_of(template), why)


def _host_of(template: str) -> str:
    from urllib.parse import urlsplit

    parts = urlsplit(template)
    return f"{parts.scheme}://{parts.hostname or ''}"


def publish_artifacts(facts: NightFacts, message: NightMessage) -> None:
    """The night's lots as a table and its message as markdown, shown on the flow run in Prefect's UI."""
    from prefect.artifacts import create_markdown_artifact, create_table_artifact

    rows = [{"lot": lot.lot_id, "product": lot.product, "disposition": lot.disposition.value,
             "hold categories": ", ".join(lot.hold_categories), "reasons": "; ".join(lot.reasons),
             "decided tonight": "yes" if lot.decided_tonight else "no (unchanged)"} for lot in facts.lots]
    create_table_artifact(rows, description=f"Night {facts.night_id} of {facts.plant_name}: lots and dispositions")
    counts = "\n".join(f"| {member.value} | {n} |" for member, n in message.counts)
    body = "\n".join(line if not line.endswith("):") else f"### {line}" for line in message.body.splitlines())
    create_markdown_artifact(f"## {message.title}\n\n| disposition | lots |\n|---|---|\n{counts}\n\n{body}\n",
                             description=f"Night {facts.night_id} summary")
