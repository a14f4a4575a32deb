"""The nightly lot-release flow: Prefect tasks, one per stage, thin around ``pipeline.night``'s use cases.

Tasks are coarse (a stage each, the per-lot maths vectorised inside) so orchestration stays
cheap; results are kept in memory (no caching, no persistence of task results).
"""

from __future__ import annotations

import resource
import time
from collections.abc import Callable
from pathlib import Path

from prefect import flow, task
from prefect.cache_policies import NONE
from prefect.utilities.annotations import quote

from pipeline import __version__
from pipeline.night.close import NightSummary
from pipeline.night.close import close as close_night
from pipeline.night.decide import decide as decide_lots
from pipeline.night.decide import earlier_decisions
from pipeline.night.decide import load_charts as read_charts
from pipeline.night.evaluate import evaluate as evaluate_lots
from pipeline.night.open import CertificateSigner, open_night
from pipeline.night.publish import publish as publish_lots
from pipeline.night.receive import assemble_intake, check_folders_writable
from pipeline.night.receive import receive as receive_exports
from pipeline.night.recovery import recover_interrupted
from pipeline.records.controlled_files import open_controlled_documents
from pipeline.records.run_lock import run_lock
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
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


receive = task(receive_exports, name="receive exports", cache_policy=NONE, persist_result=False)
assemble = task(assemble_intake, name="assemble lots", cache_policy=NONE, persist_result=False)
evaluate = task(evaluate_lots, name="compute results", cache_policy=NONE, persist_result=False)
load_charts = task(read_charts, name="read control charts", cache_policy=NONE, persist_result=False)
decide = task(decide_lots, name="trend and disposition", cache_policy=NONE, persist_result=False)
publish = task(publish_lots, name="reports, certificates, store, log", cache_policy=NONE, persist_result=False)
close = task(close_night, name="archive and LIMS results", cache_policy=NONE, persist_result=False)


def run_stages(ws: Workspace, store: Store, signer: CertificateSigner, *, orchestrated: bool = True,
               lock: bool = True) -> NightSummary:
    """The night's stages in order, as Prefect tasks (default) or as plain function calls.

    Holds the night's run lock unless the caller already holds it (``lock=False``).
    """
    step = {name: (globals()[name].fn if not orchestrated else globals()[name])
            for name in ("receive", "assemble", "evaluate", "load_charts", "decide", "publish", "close")}
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


def _stages(ws: Workspace, store: Store, signer: CertificateSigner, step: dict,
            orchestrated: bool) -> NightSummary:
    STAGE_SECONDS.clear()
    STAGE_PEAK_MB.clear()

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
    identity = workspace_id(ws.root)
    store.check_workspace(identity, shared=ws.store_shared)  # another workspace's store: refused before any move
    check_folders_writable(ws)
    recovered = recover_interrupted(ws, store, identity)
    night_id = store.start_night(__version__, identity, shared=ws.store_shared)
    intake = timed("receive", ws, store, layouts, night_id, _progress, recovered.quarantined)
    assembly = timed("assemble", intake, catalog)
    evaluations, _plates = timed("evaluate", assembly, catalog)
    charts = timed("load_charts", store, catalog, evaluations)
    decided = timed("decide", evaluations, catalog, charts, earlier_decisions(store, evaluations))
    outcomes = timed("publish", ws, store, catalog, decided, night_id, signer, _progress)
    return timed("close", ws, store, intake, outcomes, [*recovered.notes, *assembly.notes], signer)


@flow(name="lotgate-night", log_prints=False, persist_result=False)
def nightly(workspace: str, lock_held_by_caller: bool = False) -> NightSummary:
    """One night: every export in ``workspace/inbox`` to decisions, documents and records."""
    ws, store, signer = open_night(Path(workspace))
    return run_stages(ws, store, signer, orchestrated=True, lock=not lock_held_by_caller)

