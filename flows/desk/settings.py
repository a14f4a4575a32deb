"""The desk's settings: ``DIR/desk.yaml`` (optional), read strictly like every settings file."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import yaml
from pydantic import Field

from pipeline.controlled.strict import Strict, checked
from pipeline.errors import SpecificationError

SETTINGS_FILE = "desk.yaml"
LOOPBACK = frozenset({"127.0.0.1", "::1", "localhost"})


class DeskSettingsFile(Strict):
    session_timeout_minutes: int = Field(15, ge=1, le=480, description="whole minutes of inactivity, 1 to 480")
    lock_after_failures: int = Field(5, ge=3, le=10, description="failed password attempts, 3 to 10")
    secure_cookies: bool = Field(True, description="true, or false only for plain-HTTP tests on the loopback")


@dataclass(frozen=True)
class DeskSettings:
    session_timeout_s: float = 15 * 60.0
    lock_after_failures: int = 5
    secure_cookies: bool = True


def read_desk_settings(root: Path) -> DeskSettings:
    """``DIR/desk.yaml`` checked against its schema; no file: the defaults (15 min, 5 failures, Secure cookies)."""
    path = root / SETTINGS_FILE
    if not path.exists():
        return DeskSettings()
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (yaml.YAMLError, UnicodeDecodeError, OSError) as exc:
        raise SpecificationError(f"{path}: cannot be read as YAML ({exc})") from exc
    model = checked(DeskSettingsFile, {} if raw is None else raw, str(path))
    return DeskSettings(model.session_timeout_minutes * 60.0, model.lock_after_failures, model.secure_cookies)


def check_cookie_setting(settings: DeskSettings, host: str) -> None:
    """Cookies without Secure only on the loopback (plain-HTTP tests); anywhere else a set-up error."""
    if not settings.secure_cookies and host not in LOOPBACK:
        raise SpecificationError(f"{SETTINGS_FILE}: secure_cookies: false is allowed only when the desk listens on "
                                 f"the loopback (127.0.0.1), not on {host}; serve it behind TLS")
