"""Rendering a window's documents elsewhere: chunk files out, documents back (use case for a fan-out).

A large night may render its batch reports and certificates on other machines (Prefect workers
that see the workspace). The night's own process writes each chunk of a window's lots — their
dossiers and signature blocks, nothing else — into ``DIR/.fanout/night-NNNN/chunk-KKKK.json``; a
worker renders and signs them (``render_chunk``) into ``chunk-KKKK.out/``; the night's process
reads the bytes back in the lots' order and goes on as for documents rendered at home: staged,
committed in ONE transaction per window, placed (``publish``). Nothing a worker writes is a
record or a placed document; a stopped night leaves only scratch, removed by the next fan-out.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

from pipeline.errors import LotgateError
from pipeline.night.lot_documents import render_documents
from pipeline.night.open import signer_for
from pipeline.records.workspace import Workspace, atomic_write, open_workspace

FANOUT = ".fanout"


def scratch(ws: Workspace, night_id: int) -> Path:
    return ws.root / FANOUT / f"night-{night_id:04d}"


def clear_scratch(ws: Workspace) -> None:
    shutil.rmtree(ws.root / FANOUT, ignore_errors=True)


def write_chunk(ws: Workspace, night_id: int, number: int,
                jobs: list[tuple[str, dict[str, Any], dict[str, str] | None]]) -> Path:
    """The chunk's jobs (stem, dossier, signature block) as one JSON file; returns its path."""
    path = scratch(ws, night_id) / f"chunk-{number:04d}.json"
    atomic_write(path, json.dumps([{"stem": s, "dossier": d, "signature": sig} for s, d, sig in jobs],
                                  ensure_ascii=False).encode("utf-8"), durable=False)
    return path


def _inside(root: Path, path: Path) -> Path:
    resolved = path.resolve()
    if not resolved.is_relative_to((root / FANOUT).resolve()) or resolved.suffix != ".json":
        raise LotgateError(f"{path} is not a chunk file of the workspace {root}")
    return resolved


def render_chunk(workspace: Path, chunk: Path) -> int:
    """Render and sign the chunk's documents with the workspace's own signer (on a worker); returns how many lots."""
    ws = open_workspace(workspace)
    chunk = _inside(ws.root, chunk)
    signer = signer_for(ws)
    out = chunk.with_suffix(".out")
    jobs = json.loads(chunk.read_text(encoding="utf-8"))
    for job in jobs:
        report, certificate = render_documents(job["dossier"], job["signature"], signer, ws.plant_name)
        atomic_write(out / f"{job['stem']}.report.pdf", report, durable=False)
        if certificate is not None:
            atomic_write(out / f"{job['stem']}.certificate.pdf", certificate, durable=False)
    return len(jobs)


def read_rendered(chunk: Path, stems: list[str], signed: list[bool]) -> list[tuple[bytes, bytes | None]]:
    """The documents a worker rendered for ``stems``, in order; a missing one is an error naming the lot."""
    out = chunk.with_suffix(".out")
    documents = []
    for stem, certificate_expected in zip(stems, signed, strict=True):
        report_path, certificate_path = out / f"{stem}.report.pdf", out / f"{stem}.certificate.pdf"
        if not report_path.is_file() or (certificate_expected and not certificate_path.is_file()):
            raise LotgateError(f"the documents of {stem} were not rendered by the worker ({out})")
        documents.append((report_path.read_bytes(), certificate_path.read_bytes() if certificate_expected else None))
    return documents
