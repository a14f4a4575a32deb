"""Worker processes for the night: parsing a large inbox and rendering a large night's documents.

Workers come from a fork server: a fresh process that has imported lotgate once, whose forks
then start in milliseconds. The night's own process is never forked (a fork could inherit a
lock held by one of the orchestrator's threads). Each worker keeps its start-up objects out of
garbage collection. Everything sent to or from a worker must pickle.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from pipeline.intake.layouts import ExportLayout
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import ParsedExport, parse_exports

_WORKER: dict[str, Any] = {}  # a worker process's own state, set by its initializer

PRELOADED = ["pipeline.night.workers", "pipeline.night.lot_documents", "pipeline.documents.report",
             "pipeline.documents.certificate", "pipeline.records.signing"]


def process_pool(cores: int, initializer: Callable[..., None] | None = None,
                 initargs: tuple[Any, ...] = ()) -> Any:
    """Worker processes forked from a fresh server process that has imported lotgate once."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(PRELOADED)
    return ProcessPoolExecutor(max_workers=cores, mp_context=context, initializer=initializer, initargs=initargs)


def _settle() -> None:
    """Leave the objects a worker starts with (modules, fonts, keys) out of every garbage collection."""
    import gc

    gc.collect()
    gc.freeze()


# ------------------------------------------------------------------------------ parsing
def parser_start(layouts: dict[str, ExportLayout]) -> None:
    _WORKER["layouts"] = layouts
    _settle()


def parse_files(paths: list[str]) -> list[ParsedExport | ExportRejected]:
    return parse_exports([(Path(p).name, Path(p).read_bytes()) for p in paths], _WORKER["layouts"])


# ------------------------------------------------------------------------------ rendering
def renderer_start(location: str, signer: Any) -> None:
    """A rendering worker: the night's signer (re-opened here from its pickle) and the plant's name."""
    import logging

    for noisy in ("pyhanko", "pyhanko_certvalidator"):
        logging.getLogger(noisy).setLevel(logging.CRITICAL)
    _WORKER["signer"] = signer
    _WORKER["location"] = location
    _settle()


def render(job: tuple[dict[str, Any], dict[str, str] | None]) -> tuple[bytes, bytes | None]:
    from pipeline.night.lot_documents import render_documents

    return render_documents(job[0], job[1], _WORKER["signer"], _WORKER["location"])
