"""Sealing the chain's head after a night and after each person's act (use case glue).

``system_signer`` is the one place that says which identity signs checkpoints: today the
workspace's nightly signing identity (``open.signer_for``); when the installation gets a system
identity of its own, only this function changes.
"""

from __future__ import annotations

import datetime as dt
import logging
from pathlib import Path
from typing import Any

from pipeline.errors import LotgateError
from pipeline.records import checkpoints
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace
from pipeline.records.workspace_id import workspace_id


def system_signer(ws: Workspace, night_signer: Any = None) -> Any:
    """The pyHanko signer of the identity that signs checkpoints (the night's, or the workspace's)."""
    if night_signer is None:
        from pipeline.night.open import signer_for

        night_signer = signer_for(ws)
    return night_signer.identity.signer


def _timestamper(ws: Workspace) -> Any:
    if not ws.timestamp_url:
        return None
    from pyhanko.sign.timestamps import HTTPTimeStamper

    return HTTPTimeStamper(ws.timestamp_url, timeout=20)


def checkpoint_folders(ws: Workspace) -> list[Path]:
    return [ws.checkpoints, *([ws.checkpoint_copy] if ws.checkpoint_copy is not None else [])]


def seal(ws: Workspace, store: Store, occasion: str, night_signer: Any = None) -> list[Path]:
    """Sign the chain's head and write it to the checkpoint folders; nothing when the chain is empty."""
    head = checkpoints.chain_head(store)
    if head is None:
        return []
    body = checkpoints.checkpoint_body(head, written_at_utc=dt.datetime.now(dt.UTC).isoformat(timespec="milliseconds"),
                                       occasion=occasion, workspace_id=workspace_id(ws.root))
    sealed = checkpoints.sign_body(system_signer(ws, night_signer), body, _timestamper(ws))
    return checkpoints.write(checkpoint_folders(ws), sealed)


def seal_after_act(ws: Workspace, store: Store, occasion: str) -> str | None:
    """Seal after a person's act, already committed: a failure is said in one line (the next night seals it)."""
    try:
        seal(ws, store, occasion)
    except (LotgateError, OSError) as exc:
        note = f"no checkpoint was written after this act ({exc}); the next night's checkpoint will cover it"
        logging.getLogger("lotgate").warning(note)
        return note
    return None
