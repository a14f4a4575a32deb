"""Signed-in sessions, kept in the desk process's memory only (a restart signs everyone out).

A session is a random token (the cookie) whose SHA-256 keys the registry; it carries its own
CSRF token, checked on every form. It ends after ``timeout_s`` without a request, or at logout.
"""

from __future__ import annotations

import hashlib
import secrets
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass


@dataclass(frozen=True)
class Session:
    user_id: int
    login: str
    printed_name: str
    role: str
    csrf: str
    credentials_version: int = 0  # the account's password when the session began; a new one ends the session


def _key(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


class SessionRegistry:
    def __init__(self, timeout_s: float, clock: Callable[[], float] = time.monotonic):
        self.timeout_s = timeout_s
        self.clock = clock
        self._sessions: dict[str, tuple[Session, float]] = {}
        self._lock = threading.Lock()

    def start(self, user_id: int, login: str, printed_name: str, role: str,
              credentials_version: int = 0) -> tuple[str, Session]:
        token = secrets.token_urlsafe(32)
        session = Session(user_id, login, printed_name, role, secrets.token_urlsafe(32), credentials_version)
        with self._lock:
            self._sessions[_key(token)] = (session, self.clock())
        return token, session

    def get(self, token: str | None) -> Session | None:
        """The live session of ``token`` (its inactivity clock restarted), or None: unknown or timed out."""
        if not token:
            return None
        key, now = _key(token), self.clock()
        with self._lock:
            found = self._sessions.get(key)
            if found is None:
                return None
            session, last = found
            if now - last > self.timeout_s:
                del self._sessions[key]
                return None
            self._sessions[key] = (session, now)
            return session

    def end(self, token: str | None) -> Session | None:
        if not token:
            return None
        with self._lock:
            found = self._sessions.pop(_key(token), None)
        return None if found is None else found[0]

    def end_all_of(self, user_id: int) -> None:
        """End every session of an account (a new password: the person signs in again elsewhere)."""
        with self._lock:
            for key in [k for k, (s, _) in self._sessions.items() if s.user_id == user_id]:
                del self._sessions[key]


def same_token(expected: str, given: str | None) -> bool:
    """Constant-time comparison of a CSRF token."""
    return bool(given) and secrets.compare_digest(expected.encode("utf-8"), str(given).encode("utf-8"))
