"""Fan-out of a large night's rendering to Prefect workers: a chunk flow, its deployment, and the renderers.

With ``fan_out: {deployment: "lotgate-render-chunk/render-SITE", chunks: 2}`` in workspace.yaml
(and ``lotgate deploy --fan-out`` having registered that deployment), publishing a night of at
least ``from_lots`` lots renders each window's documents as ``chunks`` sub-flow runs of the
deployment (``run_deployment``), on whichever workers are free. The night's own process still
stages, commits (one transaction per window, limits with the first) and places every document
in the lots' order (pipeline/night/publish.py): the window and transaction rules are unchanged.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from prefect import flow

from pipeline.errors import LotgateError
from pipeline.night.fanout_chunks import clear_scratch, read_rendered, render_chunk, write_chunk
from pipeline.night.publish import WINDOW_LOTS, _Renderers

CHUNK_FLOW = "lotgate-render-chunk"
POLL_S = 1.0


@flow(name=CHUNK_FLOW, log_prints=False, persist_result=False)
def render_chunk_flow(workspace: str, chunk: str) -> int:
    """Render and sign one chunk of a night's documents (runs on a worker that sees the workspace)."""
    return render_chunk(Path(workspace), Path(chunk))


class DeploymentRenderers:
    """Renders each window as ``chunks`` runs of ``deployment``; same interface as publish's local renderers."""

    def __init__(self, ws: Any, signer: Any, lots: int, *, deployment: str, chunks: int, night_id: int):
        self.ws, self.deployment, self.chunks, self.night_id = ws, deployment, max(1, chunks), night_id
        self.window_lots = WINDOW_LOTS
        self.pool = deployment
        self.numbered = 0
        clear_scratch(ws)  # what a stopped night left is scratch only

    def submit(self, jobs: list[Any]) -> list[tuple[Any, Path, list[str], list[bool]]]:
        from prefect.deployments import run_deployment

        size = -(-len(jobs) // self.chunks)
        handles = []
        for start in range(0, len(jobs), size):
            part = jobs[start:start + size]
            self.numbered += 1
            path = write_chunk(self.ws, self.night_id, self.numbered, [(j.stem, j.dossier, j.signature) for j in part])
            run = run_deployment(self.deployment, parameters={"workspace": str(self.ws.root), "chunk": str(path)},
                                 timeout=0, as_subflow=True)
            handles.append((run.id, path, [j.stem for j in part], [j.signature is not None for j in part]))
        return handles

    def collect(self, handles: list[tuple[Any, Path, list[str], list[bool]]]) -> list[tuple[bytes, bytes | None]]:
        from prefect.client.orchestration import get_client

        documents: list[tuple[bytes, bytes | None]] = []
        with get_client(sync_client=True) as client:
            for run_id, path, stems, signed in handles:
                while True:
                    state = client.read_flow_run(run_id).state
                    if state is not None and state.is_final():
                        break
                    time.sleep(POLL_S)
                if not state.is_completed():
                    raise LotgateError(f"rendering {len(stems)} lots ({stems[0]} …) on a worker ended "
                                       f"{state.name}: {state.message or 'no message'}")
                documents += read_rendered(path, stems, signed)
        return documents

    def close(self) -> None:
        clear_scratch(self.ws)


def renderers_for(ws: Any, night_id: int) -> Any:
    """publish's renderer factory for this workspace: the deployment's for a large night, else the local ones."""
    if ws.fan_out_deployment is None:
        return None

    def make(ws_: Any, signer: Any, lots: int) -> Any:
        if lots < ws.fan_out_from_lots:
            return _Renderers(ws_, signer, lots, None)
        return DeploymentRenderers(ws_, signer, lots, deployment=ws.fan_out_deployment, chunks=ws.fan_out_chunks,
                                   night_id=night_id)

    return make
