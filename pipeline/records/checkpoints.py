"""Sealed checkpoints: the audit chain's head, signed and written outside the database.

At the end of each night and of each person's act, the head of the chain (sequence number, hash,
the event's time) is put in a small JSON body, signed (a detached CMS signature over the body's
canonical JSON, ``ledger.canonical_json``, carrying the signer's certificate; with a time-stamping
authority configured, an RFC 3161 timestamp token on the signature) and written atomically to
``DIR/records/checkpoints/NNNNNN.json`` (NNNNNN: the head's sequence number), and to a second
folder when the workspace names one.

``check_store`` compares the store with every checkpoint found: a signature that does not verify,
a checkpoint whose record is missing from the store (the tail was cut off), or whose hash differs
from the store's record of that number (the history was re-chained) is reported in words.
What remains possible: whoever holds both the database and the signing key can re-chain and
re-sign every checkpoint in the folders they can reach; a second folder on another host, a
time-stamping authority and a key held by another role are what separate them (README).
"""

from __future__ import annotations

import asyncio
import base64
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import SigningError
from pipeline.records import ledger
from pipeline.records.signer_check import is_system_certificate
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write

FORMAT = "lotgate-checkpoint/1"
FOLDER = Path("records") / "checkpoints"


@dataclass(frozen=True)
class ChainHead:
    seq: int
    hash: str
    time_utc: str


def chain_head(store: Store) -> ChainHead | None:
    """The last chained audit event, or None for an empty chain."""
    last = store.last_event()
    if last is None:
        return None
    return ChainHead(last.seq, last.hash, json.loads(last.body).get("time_utc", ""))


def checkpoint_body(head: ChainHead, *, written_at_utc: str, occasion: str, workspace_id: str | None) -> dict[str, Any]:
    """What a checkpoint attests (pure)."""
    return {"format": FORMAT, "seq": head.seq, "hash": head.hash, "event_time_utc": head.time_utc,
            "written_at_utc": written_at_utc, "occasion": occasion, "workspace_id": workspace_id}


def sign_body(signer: Any, body: dict[str, Any], timestamper: Any = None) -> dict[str, Any]:
    """The checkpoint file's content: the body and a detached CMS signature over its canonical JSON.

    ``signer``: a pyHanko signer (the system identity's); ``timestamper``: a pyHanko TimeStamper
    (``HTTPTimeStamper`` on the configured URL) or None.
    """
    data = ledger.canonical_json(body).encode("utf-8")
    try:
        content = asyncio.run(signer.async_sign_general_data(data, "sha256", detached=True, timestamper=timestamper))
    except Exception as exc:  # noqa: BLE001 - a TSA or key failure, reported in words
        raise SigningError(f"the checkpoint of record {body['seq']} could not be signed: {exc.__class__.__name__}: {exc}") from exc
    return {"checkpoint": body, "signature_cms_b64": base64.b64encode(content.dump()).decode("ascii"),
            "timestamped": timestamper is not None}


def write(folders: list[Path], sealed: dict[str, Any]) -> list[Path]:
    """Write the sealed checkpoint into each folder (atomic, flushed); returns the files written."""
    name = f"{sealed['checkpoint']['seq']:06d}.json"
    data = (json.dumps(sealed, indent=1, sort_keys=True) + "\n").encode("utf-8")
    written = []
    for folder in folders:
        atomic_write(folder / name, data)
        written.append(folder / name)
    return written


# --- checking ------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SealCheck:
    """One checkpoint file's signature: intact, by whom, time-stamped or not."""

    ok: bool
    signer: str
    timestamp_utc: str | None
    reason: str


def check_signature(sealed: dict[str, Any], trust_roots: list[Any] | None = None) -> SealCheck:
    """Verify the detached CMS signature over the checkpoint body with pyHanko (integrity, signer, timestamp).

    With ``trust_roots`` (the plant's configured anchor) the signer must chain to it and be the
    installation's system identity: a checkpoint anyone else signed attests nothing.
    """
    from asn1crypto import cms
    from pyhanko.sign.validation.generic_cms import async_validate_detached_cms
    from pyhanko_certvalidator import ValidationContext

    try:
        data = ledger.canonical_json(sealed["checkpoint"]).encode("utf-8")
        content = cms.ContentInfo.load(base64.b64decode(sealed["signature_cms_b64"]))
        signed = content["content"]
        context = ValidationContext(trust_roots=trust_roots or [], allow_fetching=False)
        status = asyncio.run(async_validate_detached_cms(data, signed, signer_validation_context=context,
                                                         ts_validation_context=context))
    except Exception as exc:  # noqa: BLE001 - a damaged file is a finding, not a crash
        return SealCheck(False, "", None, f"its signature cannot be read ({exc.__class__.__name__})")
    signer = status.signing_cert.subject.human_friendly if status.signing_cert is not None else "unknown"
    stamp = status.timestamp_validity
    when = stamp.timestamp.isoformat(timespec="seconds") if stamp is not None else None
    if not status.intact or not status.valid:
        return SealCheck(False, signer, when, "its signature does not match its content (the file was edited)")
    if stamp is not None and not (stamp.intact and stamp.valid):
        return SealCheck(False, signer, when, "its time stamp does not match its signature")
    if trust_roots is not None and not status.trusted:
        return SealCheck(False, signer, when, "its signer does not chain to the plant's configured trust anchor")
    if trust_roots is not None and not is_system_certificate(status.signing_cert):
        return SealCheck(False, signer, when, "it is not signed by the installation's system identity")
    return SealCheck(True, signer, when, "signature intact, by the system identity")


@dataclass(frozen=True)
class CheckpointsCheck:
    valid: bool
    checkpoints: int
    latest: str
    problems: tuple[str, ...]


def load(path: Path) -> dict[str, Any] | None:
    try:
        sealed = json.loads(path.read_text(encoding="utf-8"))
        return sealed if isinstance(sealed, dict) and isinstance(sealed.get("checkpoint"), dict) else None
    except (OSError, ValueError):
        return None


def check_store(store: Store, folders: list[Path], trust_roots: list[Any] | None = None) -> CheckpointsCheck:
    """Every checkpoint in ``folders`` against the store: signed, and its record there with the same hash."""
    files = sorted(((p.name, p) for folder in folders if folder.is_dir() for p in folder.glob("[0-9]*.json")),
                   key=lambda item: (item[0], str(item[1])))  # every copy in every folder, oldest record first
    if not files:
        return CheckpointsCheck(True, 0, "no checkpoint written yet", ())
    by_seq = {e.seq: e.hash for e in store.audit_events()}
    last_seq = max(by_seq, default=0)
    problems = []
    latest = ""
    for name, path in files:
        sealed = load(path)
        if sealed is None:
            problems.append(f"checkpoint {path}: not a checkpoint file")
            continue
        point = sealed["checkpoint"]
        seal = check_signature(sealed, trust_roots)
        if not seal.ok:
            problems.append(f"checkpoint {path}: {seal.reason}")
            continue
        seq, sha = point.get("seq"), point.get("hash")
        if seq not in by_seq:
            problems.append(f"checkpoint {name} (signed by {seal.signer}) attests record {seq} with hash {str(sha)[:16]}…, "
                            f"but the store ends at record {last_seq}: records were removed from the end")
        elif by_seq[seq] != sha:
            problems.append(f"checkpoint {name} attests record {seq} with hash {str(sha)[:16]}…, the store's record "
                            f"{seq} has {by_seq[seq][:16]}…: the history before it was rewritten and re-chained")
        latest = (f"latest {name}: record {seq} of {point.get('event_time_utc', '?')}, signed by {seal.signer}"
                  + (f", time-stamped {seal.timestamp_utc}" if seal.timestamp_utc else ""))
    return CheckpointsCheck(not problems, len(files), latest, tuple(problems))
