"""Opening a workspace for a command: its folders, store, signer and controlled files (adapter glue)."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from pipeline.errors import InputError, SigningError
from pipeline.records.controlled_files import open_controlled_documents
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, open_workspace
from pipeline.release.signature import SignatureSlot


class CertificateSigner(Protocol):
    signer_name: str
    fingerprint_sha256: str

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str,
             reserve: SignatureSlot | None = None) -> bytes: ...


@dataclass(frozen=True)
class IdentitySigner:
    """Signs certificates with a loaded identity (see pipeline.records.signing).

    Sent to a worker process, it travels as its file and passphrase (in the pickle, never in an
    environment variable) and is opened again there.
    """

    identity: Any
    p12: Path | None = None  # None: an identity a person unlocked, used in this process only
    passphrase_file: Path | None = None
    passphrase: bytes | None = field(default=None, repr=False)

    @property
    def signer_name(self) -> str:
        return str(self.identity.signer_name)

    @property
    def fingerprint_sha256(self) -> str:
        return str(self.identity.fingerprint_sha256)

    def sign(self, pdf: bytes, *, signed_at: dt.datetime, reason: str, location: str,
             reserve: SignatureSlot | None = None) -> bytes:
        """Sign ``pdf``; ``reserve``: also add, under this signature, the empty field a later approval fills."""
        from pipeline.records.signing import sign_pdf

        return sign_pdf(pdf, self.identity, reason=reason, location=location, signed_at=signed_at, reserve=reserve)

    def __reduce__(self) -> tuple[Any, tuple[Any, ...]]:
        if self.p12 is None:
            raise SigningError(f"the identity of {self.signer_name} was unlocked in this process only; "
                               "it cannot be sent to a worker process")
        return opened_signer, (self.p12, self.passphrase_file, self.passphrase)


def opened_signer(p12: Path, passphrase_file: Path | None, passphrase: bytes | None) -> IdentitySigner:
    """The identity in ``p12``, unlocked with ``passphrase`` when given, else with ``passphrase_file``."""
    from pipeline.records import signing

    identity = signing.load_identity(p12, passphrase=passphrase, passphrase_env="", passphrase_file=passphrase_file)
    return IdentitySigner(identity, p12, passphrase_file, passphrase)


def signer_for(ws: Workspace) -> IdentitySigner:
    """The workspace's SYSTEM identity: its own PKCS#12, or the demo one when asked for.

    The identity must say it is the lotgate system (never a person's certificate) and, with a
    trust anchor configured, chain to it. The passphrase in LOTGATE_SIGNING_PASSPHRASE is taken out
    of the environment here (see ``signing.take_passphrase``), whichever identity is used, so no
    child process inherits it.
    """
    from pipeline.records import signing
    from pipeline.records.demo_trust import create_demo_trust
    from pipeline.records.signer_check import system_identity_problem

    secret = signing.take_passphrase()
    if ws.signing_p12 is not None:
        signer = opened_signer(ws.signing_p12, ws.signing_passphrase_file, secret)
    elif (ws.keys / "use-demo-identity").exists():
        demo = create_demo_trust(ws.keys, ws.plant_name)
        signer = opened_signer(demo.system_p12, demo.system_passphrase, None)
    else:
        raise SigningError(
            f"no signing identity is set up for the workspace {ws.root}: put 'signing: {{p12: FILE, passphrase_file: "
            f"FILE}}' in {ws.root / 'workspace.yaml'} (or set LOTGATE_SIGNING_PASSPHRASE), or run 'lotgate keys demo "
            f"--workspace {ws.root}' for a demo identity")
    problem = system_identity_problem(signer.identity, ws.trust_root)
    if problem is not None:
        raise SigningError(f"the system identity of {ws.root} cannot be used: {problem}")
    return signer


def open_night(root: Path) -> tuple[Workspace, Store, IdentitySigner]:
    """Open the workspace, its store and its signer for a night; fail before any file is touched.

    Everything a night needs is checked here, before Prefect or any worker starts: the settings,
    the inbox, the signing identity (its passphrase taken out of the environment), the
    specifications, methods and export layouts, and the database URL and store.
    """
    ws = open_workspace(root)
    if not ws.inbox.is_dir():
        raise InputError(f"{ws.inbox} does not exist: the workspace needs an inbox/ folder with tonight's exports")
    signer = signer_for(ws)
    from pipeline.night.release_modes import with_release_modes

    with_release_modes(open_controlled_documents(ws)[0], ws)
    ws.make_folders()
    store = Store(ws.database_url, clock_tolerance_minutes=ws.clock_tolerance_minutes)
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
    return ws, Store(ws.database_url, clock_tolerance_minutes=ws.clock_tolerance_minutes)
