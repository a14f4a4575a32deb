"""Opening a workspace for a command: its folders, store, signer and controlled files (adapter glue)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from pipeline.errors import InputError, SigningError
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, open_workspace


class CertificateSigner(Protocol):
    signer_name: str
    fingerprint_sha256: str

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str) -> bytes: ...


@dataclass(frozen=True)
class IdentitySigner:
    """Signs certificates with a loaded identity (see pipeline.records.signing)."""

    identity: Any

    @property
    def signer_name(self) -> str:
        return str(self.identity.signer_name)

    @property
    def fingerprint_sha256(self) -> str:
        return str(self.identity.fingerprint_sha256)

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str) -> bytes:
        from pipeline.records.signing import sign_pdf

        return sign_pdf(pdf, self.identity, reason=reason, location=location, signed_at=signed_at)


def signer_for(ws: Workspace) -> IdentitySigner:
    """The workspace's signing identity: its own PKCS#12, or the demo identity when asked for."""
    from pipeline.records import signing
    from pipeline.records.demo_identity import create_demo_identity

    if ws.signing_p12 is not None:
        return IdentitySigner(signing.load_identity(ws.signing_p12, passphrase_file=ws.signing_passphrase_file))
    if (ws.keys / "use-demo-identity").exists():
        demo = create_demo_identity(ws.keys, ws.plant_name, ws.signer_name)
        return IdentitySigner(signing.load_identity(demo.p12_path, passphrase_file=demo.passphrase_path))
    raise SigningError(
        f"no signing identity is set up for the workspace {ws.root}: put 'signing: {{p12: FILE, passphrase_file: FILE}}' "
        f"in {ws.root / 'workspace.yaml'} (or set LOTGATE_SIGNING_PASSPHRASE), or run 'lotgate keys demo --workspace {ws.root}' "
        "for a demo identity")


def open_night(root: Path) -> tuple[Workspace, Store, IdentitySigner]:
    """Open the workspace, its store and its signer for a night; fail before any file is touched."""
    ws = open_workspace(root)
    if not ws.inbox.is_dir():
        raise InputError(f"{ws.inbox} does not exist: the workspace needs an inbox/ folder with tonight's exports")
    ws.make_folders()
    signer = signer_for(ws)
    store = Store(ws.database_url)
    return ws, store, signer


def open_records(root: Path) -> tuple[Workspace, Store]:
    """Open an existing workspace and its store for a command that reads or adds records.

    Refuses a folder that does not exist, and a workspace whose SQLite store does not exist yet
    (a night has not run there): opening it would create an empty store.
    """
    root = root.expanduser()
    if not root.is_dir():
        raise InputError(f"the workspace {root} does not exist")
    ws = open_workspace(root)
    if ws.database_url.startswith("sqlite:///"):
        db = Path(ws.database_url.removeprefix("sqlite:///"))
        if not db.exists():
            raise InputError(f"no results store in {ws.root} (expected {db}); run a night there first")
    return ws, Store(ws.database_url)
