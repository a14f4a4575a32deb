"""The nightly lot-release flow: Prefect tasks, one per stage, thin around ``pipeline.night``.

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

from pipeline.night import stages as night
from pipeline.night.stages import NightSummary
from pipeline.records.run_lock import run_lock
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace

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


receive = task(night.receive, name="receive exports", cache_policy=NONE, persist_result=False)
assemble = task(night.assemble_intake, name="assemble lots", cache_policy=NONE, persist_result=False)
evaluate = task(night.evaluate, name="compute results", cache_policy=NONE, persist_result=False)
load_charts = task(night.load_charts, name="read control charts", cache_policy=NONE, persist_result=False)
decide = task(night.decide, name="trend and disposition", cache_policy=NONE, persist_result=False)
publish = task(night.publish, name="reports, certificates, store, log", cache_policy=NONE, persist_result=False)
close = task(night.close, name="archive and LIMS results", cache_policy=NONE, persist_result=False)


def run_stages(ws: Workspace, store: Store, signer: night.CertificateSigner, *, orchestrated: bool = True,
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


def _stages(ws: Workspace, store: Store, signer: night.CertificateSigner, step: dict,
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

    catalog, layouts = night.open_catalog_and_layouts(ws)
    recovered = night.recover_interrupted(ws, store)
    night_id = store.start_night(night.__version__)
    intake = timed("receive", ws, store, layouts, night_id, _progress, recovered.quarantined)
    assembly = timed("assemble", intake, catalog)
    evaluations, _plates = timed("evaluate", assembly, catalog)
    charts = timed("load_charts", store, catalog, evaluations)
    decisions = timed("decide", evaluations, catalog, charts, night.earlier_decisions(store, evaluations))
    outcomes = timed("publish", ws, store, catalog, decisions, night_id, charts, signer, _progress)
    return timed("close", ws, store, intake, outcomes, [*recovered.notes, *assembly.notes])


@flow(name="lotgate-night", log_prints=False, persist_result=False)
def nightly(workspace: str, lock_held_by_caller: bool = False) -> NightSummary:
    """One night: every export in ``workspace/inbox`` to decisions, documents and records."""
    ws, store, signer = night.open_night(Path(workspace))
    return run_stages(ws, store, signer, orchestrated=True, lock=not lock_held_by_caller)

