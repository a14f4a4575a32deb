"""The workspace on disk (adapter): folders, settings, atomic writes and file moves."""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import yaml

from pipeline.errors import SpecificationError

DEFAULT_TIME_ZONE = "Europe/Berlin"


@dataclass(frozen=True)
class Workspace:
    root: Path
    plant_name: str
    time_zone: str
    database_url: str
    signing_p12: Path | None
    signing_passphrase_file: Path | None
    signer_name: str
    # The plant's own controlled folders, by kind (see CONTROLLED_KINDS); a kind not named here
    # comes from the environment or lotgate's shipped folders (pipeline.records.controlled_files).
    controlled: tuple[tuple[str, Path], ...] = ()
    # True when several workspaces (sites) share one results store on purpose (lot ids then unique across them)
    store_shared: bool = False

    @property
    def inbox(self) -> Path:
        return self.root / "inbox"

    @property
    def archive(self) -> Path:
        return self.root / "archive"

    @property
    def quarantine(self) -> Path:
        return self.root / "quarantine"

    @property
    def certificates(self) -> Path:
        return self.root / "certificates"

    @property
    def reports(self) -> Path:
        return self.root / "reports"

    @property
    def lims(self) -> Path:
        return self.root / "lims"

    @property
    def keys(self) -> Path:
        return self.root / "keys"

    @property
    def log(self) -> Path:
        return self.root / "decisions.jsonl"

    def make_folders(self) -> None:
        for folder in (self.inbox, self.archive, self.quarantine, self.certificates, self.reports, self.lims):
            folder.mkdir(parents=True, exist_ok=True)


SETTINGS_FILE = "workspace.yaml"
CONTROLLED_KINDS = {
    "specifications": "product specifications",
    "methods": "assay methods",
    "layouts": "export layouts",
}


def _controlled_folders(root: Path, setting: object, path: Path) -> tuple[tuple[str, Path], ...]:
    """The ``controlled:`` setting: each named folder, relative to the workspace, must exist."""
    if setting is None:
        return ()
    if not isinstance(setting, dict):
        raise SpecificationError(f"{path}: 'controlled' must map {', '.join(CONTROLLED_KINDS)} to folders")
    folders = {}
    for kind, value in setting.items():
        if kind not in CONTROLLED_KINDS:
            raise SpecificationError(f"{path}: 'controlled' names '{kind}'; allowed: {', '.join(CONTROLLED_KINDS)}")
        if not isinstance(value, str) or not value.strip():
            raise SpecificationError(f"{path}: 'controlled.{kind}' must be a folder name, found {value!r}")
        folder = (root / Path(value).expanduser()).resolve()
        if not folder.is_dir():
            raise SpecificationError(
                f"{path}: the folder of {CONTROLLED_KINDS[kind]} (controlled.{kind}: {value}) "
                f"does not exist: {folder}")
        folders[kind] = folder
    return tuple(folders.items())


def open_workspace(root: Path, *, plant_name: str | None = None, signer_name: str | None = None) -> Workspace:
    """Read ``DIR/workspace.yaml`` if present; the environment's LOTGATE_DATABASE_URL wins.

    A ``controlled:`` setting that names a missing folder is refused here, before any night starts.
    """
    root = root.resolve()
    settings: dict = {}
    path = root / SETTINGS_FILE
    if path.exists():
        try:
            settings = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
        except yaml.YAMLError as exc:
            raise SpecificationError(f"{path}: not valid YAML ({exc})") from exc
        if not isinstance(settings, dict):
            raise SpecificationError(f"{path}: expected a mapping of settings")
    url = os.environ.get("LOTGATE_DATABASE_URL") or settings.get("database_url") or f"sqlite:///{root / 'lotgate.db'}"
    signing = settings.get("signing") or {}
    p12 = signing.get("p12")
    passphrase_file = signing.get("passphrase_file")
    return Workspace(
        root=root,
        plant_name=str(settings.get("plant_name") or plant_name or "Unnamed plant"),
        time_zone=str(settings.get("time_zone") or DEFAULT_TIME_ZONE),
        database_url=str(url),
        signing_p12=Path(p12) if p12 else None,
        signing_passphrase_file=Path(passphrase_file) if passphrase_file else None,
        signer_name=str(signing.get("signer_name") or signer_name or "QA reviewer"),
        controlled=_controlled_folders(root, settings.get("controlled"), path),
        store_shared=settings.get("store_shared") is True,
    )


def write_settings(root: Path, settings: dict) -> None:
    root.mkdir(parents=True, exist_ok=True)
    atomic_write(root / SETTINGS_FILE, yaml.safe_dump(settings, sort_keys=False).encode("utf-8"))


def atomic_write(path: Path, data: bytes, *, durable: bool = True) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``.

    A reader (or a restart after a killed run) sees the old file or the new one, never a part.
    ``durable`` also flushes the bytes to disk before the rename (survives a power cut); files
    that can be made again from the store (batch reports, dossiers) skip that cost.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
            out.flush()
            if durable:
                os.fsync(out.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def unique_target(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/name.2`` … when that exists (nothing is ever overwritten)."""
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / name
    counter = 2
    while target.exists():
        target = folder / f"{name}.{counter}"
        counter += 1
    return target
