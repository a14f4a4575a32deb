"""The register of authorised signers on disk (adapter): read strictly, its version recorded when new.

``read_register`` reads the workspace's configured register file (YAML; see
``pipeline.controlled.signer_register`` for its schema). ``register_in_force`` also writes a
``signer-register-in-force`` audit event (version, approver, SHA-256, people and roles) the first
time a register with that SHA-256 is used, so the trail shows which register every later act
was checked against.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import yaml

from pipeline.controlled.signer_register import SignerRegister, parse_register
from pipeline.errors import SigningError, SpecificationError
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace

REGISTER_EVENT = "signer-register-in-force"


def read_register(path: Path | None, root: Path | None = None) -> SignerRegister:
    """The register at ``path``; SigningError when none is configured, SpecificationError when it is wrong."""
    if path is None:
        where = f" ({root / 'workspace.yaml'})" if root is not None else ""
        raise SigningError(f"no register of authorised signers is configured{where}: set 'signer_register: FILE'; "
                           "no person's signature is accepted without one")
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise SpecificationError(f"{path}: the register of authorised signers does not exist") from None
    except OSError as exc:
        raise SpecificationError(f"{path}: cannot be read ({exc.strerror})") from exc
    try:
        raw = yaml.safe_load(data.decode("utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as exc:
        raise SpecificationError(f"{path}: not valid YAML ({' '.join(str(exc).split())})") from exc
    return parse_register(raw, str(path), hashlib.sha256(data).hexdigest())


def _recorded(store: Store, sha256: str) -> bool:
    return any(json.loads(body).get("register_sha256") == sha256 for body in store.event_bodies(REGISTER_EVENT))


def register_event(ws: Workspace, register: SignerRegister) -> dict:
    """The audit event saying this register is in force (to be chained with the act that first uses it)."""
    source = Path(register.source)
    shown = str(source.relative_to(ws.root)) if source.is_relative_to(ws.root) else str(source)
    return audit.event(REGISTER_EVENT, time_zone=ws.time_zone, register_file=shown,
                       register_version=register.version, register_sha256=register.sha256,
                       approved_by=register.approved_by,
                       signers=[{"person": e.person, "printed_name": e.printed_name,
                                 "certificate_sha256": e.certificate_sha256, "subject": e.subject, "issuer": e.issuer,
                                 "roles": sorted(r.value for r in e.roles), "valid_from": e.valid_from.isoformat(),
                                 "valid_to": e.valid_to.isoformat()} for e in register.entries])


def register_in_force(ws: Workspace, store: Store) -> tuple[SignerRegister, list[dict]]:
    """The workspace's register, and the audit event to chain when this version was never recorded (else none)."""
    register = read_register(ws.signer_register, ws.root)
    return register, ([] if _recorded(store, register.sha256) else [register_event(ws, register)])
