"""Sending a night's message to the people the workspace names (adapter around apprise).

``workspace.yaml`` names the recipients as notification URLs (``notify: {urls: [...]}``): any
URL apprise understands (``mailtos://``, ``json://``, ``form://``, chat webhooks). A secret is
never written there: a URL carries a placeholder such as ``{SMTP_PASSWORD}``, filled at send time
from the environment variable of that name, else from the ``secrets_file`` (``NAME=value`` lines,
readable by its owner only, mode 0600). A URL with a password or token written out in the
settings is refused. Messages, logs and errors name a recipient only by its URL as written in
the settings (placeholders unfilled); apprise's own log lines pass through a filter that blanks
every secret value.
"""

from __future__ import annotations

import logging
import os
import re
import stat
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import urlsplit

from pipeline.errors import LotgateError

PLACEHOLDER = re.compile(r"\{([A-Z][A-Z0-9_]{0,63})\}")
_SECRET_QUERY_KEYS = ("pass", "password", "token", "secret", "key", "apikey", "webhook")


class NotifyError(LotgateError):
    """The notification settings cannot be used (a missing secret, a bad secrets file, a secret in the settings)."""


@dataclass(frozen=True)
class Recipients:
    """The URLs as written (placeholders unfilled) and the secret values that fill them (never printed)."""

    templates: tuple[str, ...]
    secrets: Mapping[str, str] = field(default_factory=dict, repr=False)

    def filled(self, template: str) -> str:
        return PLACEHOLDER.sub(lambda m: self.secrets[m.group(1)], template)


@dataclass(frozen=True)
class SendReport:
    sent: tuple[str, ...]  # templates
    failed: tuple[tuple[str, str], ...]  # (template, why)


def check_no_written_secret(url: str, where: str) -> None:
    """Refuse a URL whose password, or a secret-looking query value, is written out rather than a placeholder."""
    parts = urlsplit(url)
    netloc = parts.netloc
    if "@" in netloc:
        userinfo = netloc.rsplit("@", 1)[0]
        if ":" in userinfo and not PLACEHOLDER.fullmatch(userinfo.split(":", 1)[1]):
            raise NotifyError(f"{where}: the notification URL {_shown(url)} has a password written in it; write a "
                              "placeholder such as {SMTP_PASSWORD} and set it in the environment or the secrets_file")
    for pair in parts.query.split("&"):
        key, _, value = pair.partition("=")
        if key.lower() in _SECRET_QUERY_KEYS and value and not PLACEHOLDER.fullmatch(value):
            raise NotifyError(f"{where}: the notification URL {_shown(url)} has a secret written in its '{key}' "
                              "parameter; write a placeholder such as {TOKEN} instead")


def _shown(url: str) -> str:
    """A URL for a message with everything after the host blanked, in case it is the secret itself."""
    parts = urlsplit(url)
    host = parts.netloc.rsplit("@", 1)[-1]
    return f"{parts.scheme}://{host}/…" if parts.scheme else "(not a URL)"


def read_secrets_file(path: Path) -> dict[str, str]:
    """``NAME=value`` lines of a file only its owner may read (blank lines and ``#`` comments skipped)."""
    try:
        info = path.stat()
    except OSError as exc:
        raise NotifyError(f"the notification secrets file {path} cannot be read ({exc.strerror})") from exc
    if info.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise NotifyError(f"the notification secrets file {path} may be read by others (mode "
                          f"{stat.S_IMODE(info.st_mode):04o}); make it readable by its owner only: chmod 600 {path}")
    out: dict[str, str] = {}
    for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        name, sep, value = line.partition("=")
        if not sep or not re.fullmatch(r"[A-Z][A-Z0-9_]{0,63}", name.strip()):
            raise NotifyError(f"{path}, line {number}: expected NAME=value with NAME in capitals, digits and _")
        out[name.strip()] = value.strip()
    return out


def recipients(urls: tuple[str, ...], secrets_file: Path | None, settings_file: str,
               environ: Mapping[str, str] | None = None) -> Recipients:
    """The workspace's recipients with every placeholder's secret found (environment first, then the file)."""
    environ = os.environ if environ is None else environ
    for url in urls:
        check_no_written_secret(url, settings_file)
    needed = sorted({name for url in urls for name in PLACEHOLDER.findall(url)})
    from_file = read_secrets_file(secrets_file) if secrets_file is not None and needed else {}
    secrets: dict[str, str] = {}
    for name in needed:
        value = environ.get(name) or from_file.get(name)
        if not value:
            where = f" or in {secrets_file}" if secrets_file is not None else ""
            raise NotifyError(f"{settings_file}: the notification URLs use the secret {{{name}}}, which is not set "
                              f"in the environment{where}")
        secrets[name] = value
    return Recipients(tuple(urls), secrets)


class _Blank(logging.Filter):
    """Blanks every secret value in apprise's log records."""

    def __init__(self, secrets: Mapping[str, str]):
        super().__init__()
        self.values = sorted((v for v in secrets.values() if v), key=len, reverse=True)

    def filter(self, record: logging.LogRecord) -> bool:
        if self.values:
            text = record.getMessage()
            for value in self.values:
                text = text.replace(value, "***")
            record.msg, record.args = text, None
        return True


@contextmanager
def _apprise_logs_blanked(secrets: Mapping[str, str]) -> Iterator[None]:
    logger = logging.getLogger("apprise")
    blank = _Blank(secrets)
    logger.addFilter(blank)
    try:
        yield
    finally:
        logger.removeFilter(blank)


def send(to: Recipients, title: str, body: str) -> SendReport:
    """Send ``title`` and ``body`` to each recipient; a failure of one does not stop the others."""
    import apprise

    sent: list[str] = []
    failed: list[tuple[str, str]] = []
    with _apprise_logs_blanked(to.secrets):
        for template in to.templates:
            channel = apprise.Apprise(asset=apprise.AppriseAsset(secure_logging=True))
            if not channel.add(to.filled(template)):
                failed.append((template, "not a notification URL lotgate can use"))
                continue
            try:
                ok = channel.notify(title=title, body=body, body_format=apprise.NotifyFormat.TEXT)
            except Exception as exc:  # a plugin's own error: reported by its kind only (its text may hold the URL)
                failed.append((template, f"the sender failed ({exc.__class__.__name__})"))
                continue
            if ok:
                sent.append(template)
            else:
                failed.append((template, "the recipient's server did not accept it"))
    return SendReport(tuple(sent), tuple(failed))
