"""The workspace on disk (adapter): folders, settings, atomic writes and file moves."""

from __future__ import annotations

import difflib
import os
import re
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

import yaml
from pydantic import Field, field_validator

from pipeline.controlled.strict import Strict, Text, checked
from pipeline.errors import SpecificationError
from pipeline.records.database import check_url
from pipeline.records.workspace_id import workspace_id
from pipeline.vocabulary import ReleaseMode, SpecificationDate

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
    # Which of a lot's dates chooses its specification version (pipeline.controlled.catalog)
    specification_date: SpecificationDate = SpecificationDate.ASSAY
    # --- operations: schedule and notifications (pipeline/records/notify.py) ---
    schedule_cron: str | None = None  # five-field cron in the plant's time zone; None: no schedule
    notify_urls: tuple[str, ...] = ()  # apprise URLs, possibly with {NAME} secret placeholders
    notify_secrets_file: Path | None = None  # a 0600 file of NAME=value lines
    desk_url: str | None = None  # the review desk's base URL, for links in messages
    fan_out_deployment: str | None = None  # render a large night's documents on workers (flows/fanout.py)
    fan_out_chunks: int = 2
    fan_out_from_lots: int = 24
    # Trust and release (see DEVELOPERS.md, "Identities, the register of signers and verification")
    trust_root: Path | None = None  # the plant's configured root CA: the only anchor signatures chain to
    signer_register: Path | None = None  # the controlled register of authorised signers (YAML)
    release_mode: ReleaseMode = ReleaseMode.APPROVAL  # the plant's default; a specification may set its own
    release_procedure: str | None = None  # the procedure allowing release by exception (automatic mode)
    reason_pattern: str | None = None  # a reference every person's reason must contain, e.g. CC-[0-9]+
    # Records nobody rewrites unseen (see pipeline/records/checkpoints.py and clock.py)
    checkpoint_copy: Path | None = None      # a second folder for sealed checkpoints (on another host)
    timestamp_url: str | None = None         # an RFC 3161 time-stamping authority for checkpoints
    clock_tolerance_minutes: float = 5.0     # how far an event may be dated before the chain's head

    def site_id(self) -> str | None:
        """The workspace identity when sites share the store (whose lots are this site's), else None: every lot."""
        return workspace_id(self.root) if self.store_shared else None

    @property
    def checkpoints(self) -> Path:
        return self.root / "records" / "checkpoints"

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


class SigningSettings(Strict):
    p12: Text | None = Field(None, description="the path of a PKCS#12 file")
    passphrase_file: Text | None = Field(None, description="the path of a file holding the passphrase")
    signer_name: Text | None = None


class TrustSettings(Strict):
    root_ca: Text = Field(description="the path of the plant's root CA certificate (PEM)")


class ReleaseSettings(Strict):
    default_mode: Literal["approval", "automatic"] = Field("approval", description="'approval' or 'automatic'")
    procedure: Text | None = Field(None, description="the name of the procedure allowing release by exception")
    reason_reference_pattern: Text | None = Field(
        None, description="a regular expression every person's reason must contain, e.g. 'CC-[0-9]{4}'")

    @field_validator("reason_reference_pattern")
    @classmethod
    def _a_pattern(cls, pattern: str | None) -> str | None:
        if pattern is not None:
            try:
                re.compile(pattern)
            except re.error as exc:
                raise ValueError(f"is not a valid regular expression ({exc})") from exc
        return pattern


class ControlledSettings(Strict):
    specifications: Text | None = Field(None, description="a folder name")
    methods: Text | None = Field(None, description="a folder name")
    layouts: Text | None = Field(None, description="a folder name")


_CRON_FIELD = re.compile(r"^[0-9A-Za-z*,/-]+$")


class ScheduleSettings(Strict):
    cron: Text = Field(description="five cron fields in the plant's time zone, e.g. '30 1 * * *'")

    @field_validator("cron")
    @classmethod
    def _five_fields(cls, cron: str) -> str:
        fields = cron.split()
        if len(fields) != 5 or not all(_CRON_FIELD.match(f) for f in fields):
            raise ValueError(f"must be five cron fields (minute hour day month weekday), e.g. '30 1 * * *', "
                             f"found {cron!r}")
        return cron


class NotifySettings(Strict):
    urls: list[Text] = Field(description="a list of notification URLs (mailto://, json://, ...)")
    secrets_file: Text | None = Field(None, description="the path of a file (mode 0600) of NAME=value lines")
    desk_url: Text | None = Field(None, description="the review desk's base URL, e.g. https://qc-desk.example")

    @field_validator("desk_url")
    @classmethod
    def _http(cls, url: str | None) -> str | None:
        if url is not None and not url.startswith(("http://", "https://")):
            raise ValueError(f"must start with http:// or https://, found {url!r}")
        return url


class FanOutSettings(Strict):
    deployment: Text = Field(description="a deployment name, e.g. lotgate-render-chunk/render-site-a")
    chunks: int = Field(2, ge=1, le=64, description="a whole number of chunks per window, 1 to 64")
    from_lots: int = Field(24, ge=1, description="a whole number of lots from which a night fans out")
class RecordsSettings(Strict):
    checkpoint_copy: Text | None = Field(None, description="a folder (best on another host) for a copy of each checkpoint")
    timestamp_url: Text | None = Field(None, description="the http(s) URL of an RFC 3161 time-stamping authority")
    clock_tolerance_minutes: float = Field(5.0, ge=0, le=1440, description="minutes, from 0 to 1440")


class WorkspaceSettings(Strict):
    """The declared schema of ``workspace.yaml``: any other key is refused, naming the nearest known one."""

    plant_name: Text | None = None
    time_zone: Text | None = Field(None, description="a time zone of the IANA database, e.g. Europe/Berlin")
    database_url: Text | None = Field(None, description="a database URL, e.g. sqlite:///lotgate.db")
    signing: SigningSettings | None = Field(
        None, description="a mapping with p12, passphrase_file and signer_name")
    controlled: ControlledSettings | None = Field(
        None, description="a mapping of specifications, methods, layouts to folders")
    store_shared: bool = Field(False, description="true or false: whether other workspaces (sites) share the store")
    specification_date: Literal["assay", "manufacture"] = Field(
        "assay", description="assay or manufacture: the lot's date that chooses its specification")
    # --- operations ---
    schedule: ScheduleSettings | None = Field(None, description="a mapping with cron")
    notify: NotifySettings | None = Field(None, description="a mapping with urls, secrets_file and desk_url")
    fan_out: FanOutSettings | None = Field(None, description="a mapping with deployment, chunks and from_lots")
    trust: TrustSettings | None = Field(None, description="a mapping with root_ca: the plant's root CA file")
    signer_register: Text | None = Field(None, description="the path of the register of authorised signers")
    release: ReleaseSettings | None = Field(
        None, description="a mapping with default_mode, procedure and reason_reference_pattern")
    records: RecordsSettings | None = Field(
        None, description="a mapping with checkpoint_copy, timestamp_url and clock_tolerance_minutes")

    @field_validator("time_zone")
    @classmethod
    def _known_zone(cls, zone: str | None) -> str | None:
        if zone is not None and not _is_time_zone(zone):
            near = difflib.get_close_matches(zone, sorted(available_timezones()), n=1)
            raise ValueError(f"names no time zone of the IANA database, found {zone!r}"
                             + (f" (did you mean '{near[0]}'?)" if near else "; e.g. Europe/Berlin or UTC"))
        return zone


def _is_time_zone(zone: str) -> bool:
    try:
        ZoneInfo(zone)
    except (ZoneInfoNotFoundError, ValueError):
        return False
    return True


def _controlled_folders(root: Path, setting: ControlledSettings | None, path: Path) -> tuple[tuple[str, Path], ...]:
    """The ``controlled:`` setting: each named folder, relative to the workspace, must exist."""
    if setting is None:
        return ()
    folders = {}
    for kind, value in setting.model_dump(exclude_none=True).items():
        folder = (root / Path(value).expanduser()).resolve()
        if not folder.is_dir():
            raise SpecificationError(
                f"{path}: the folder of {CONTROLLED_KINDS[kind]} (controlled.{kind}: {value}) "
                f"does not exist: {folder}")
        folders[kind] = folder
    return tuple(folders.items())


def read_settings(root: Path) -> WorkspaceSettings:
    """``DIR/workspace.yaml`` checked against its declared schema (no file: every default)."""
    path = root / SETTINGS_FILE
    if not path.exists():
        return WorkspaceSettings()
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError) as exc:
        raise SpecificationError(f"{path}: not valid YAML ({exc})") from exc
    except OSError as exc:
        raise SpecificationError(f"{path}: cannot be read ({exc.strerror})") from exc
    return checked(WorkspaceSettings, {} if raw is None else raw, str(path))


def open_workspace(root: Path, *, plant_name: str | None = None, signer_name: str | None = None) -> Workspace:
    """Read ``DIR/workspace.yaml`` if present; the environment's LOTGATE_DATABASE_URL wins.

    An unknown key, a value of the wrong type, an unknown time zone, a database URL that cannot be
    used or a ``controlled:`` setting that names a missing folder is refused here, before any night
    starts.
    """
    root = root.resolve()
    settings = read_settings(root)
    url = os.environ.get("LOTGATE_DATABASE_URL") or settings.database_url or f"sqlite:///{root / 'lotgate.db'}"
    check_url(url)
    signing = settings.signing or SigningSettings()
    release = settings.release or ReleaseSettings()
    demo = (root / "keys" / "use-demo-identity").exists()  # the workspace's own choice, never a document's folder
    trust_root = _setting_path(root, settings.trust.root_ca if settings.trust else None,
                               root / "keys" / "root-ca.pem" if demo else None)
    register = _setting_path(root, settings.signer_register, root / "keys" / "signers.yaml" if demo else None)
    records = settings.records or RecordsSettings()
    return Workspace(
        root=root,
        plant_name=settings.plant_name or plant_name or "Unnamed plant",
        time_zone=settings.time_zone or DEFAULT_TIME_ZONE,
        database_url=url,
        signing_p12=Path(signing.p12) if signing.p12 else None,
        signing_passphrase_file=Path(signing.passphrase_file) if signing.passphrase_file else None,
        signer_name=signing.signer_name or signer_name or "QA reviewer",
        controlled=_controlled_folders(root, settings.controlled, root / SETTINGS_FILE),
        store_shared=settings.store_shared,
        specification_date=SpecificationDate(settings.specification_date),
        trust_root=trust_root,
        signer_register=register,
        release_mode=ReleaseMode(release.default_mode),
        release_procedure=release.procedure,
        reason_pattern=release.reason_reference_pattern,
        **_operations(root, settings),
        checkpoint_copy=(root / Path(records.checkpoint_copy).expanduser()) if records.checkpoint_copy else None,
        timestamp_url=records.timestamp_url,
        clock_tolerance_minutes=records.clock_tolerance_minutes,
    )


def _operations(root: Path, settings: WorkspaceSettings) -> dict:
    """The schedule and notification settings (secrets are never here: see pipeline/records/notify.py)."""
    notify = settings.notify
    secrets = None if notify is None or notify.secrets_file is None else (root / Path(notify.secrets_file).expanduser())
    return {"schedule_cron": None if settings.schedule is None else settings.schedule.cron,
            "notify_urls": () if notify is None else tuple(notify.urls),
            "notify_secrets_file": secrets,
            "desk_url": None if notify is None or notify.desk_url is None else notify.desk_url.rstrip("/"),
            **({} if settings.fan_out is None else {"fan_out_deployment": settings.fan_out.deployment,
                                                    "fan_out_chunks": settings.fan_out.chunks,
                                                    "fan_out_from_lots": settings.fan_out.from_lots})}


def _setting_path(root: Path, value: str | None, demo_default: Path | None) -> Path | None:
    """A file named in the settings (relative to the workspace), else the demo identity's file."""
    if value is not None:
        return (root / Path(value).expanduser()).resolve()
    return demo_default


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
