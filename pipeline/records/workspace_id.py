"""The workspace's identity (adapter): a random id written once into the workspace.

The store records it with every night, so a store refuses nights from a workspace that is not
its own (unless the plant declares the store shared), and the run lock on a PostgreSQL store is
keyed by it.
"""

from __future__ import annotations

import hashlib
import os
import uuid
from pathlib import Path

from pipeline.errors import InputError

ID_FILE = ".lotgate-workspace-id"


def workspace_id(root: Path) -> str:
    """The id in ``root/.lotgate-workspace-id``, written there (once, never replaced) when missing."""
    path = root / ID_FILE
    if not path.exists():
        try:
            handle = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:  # written meanwhile by another process
            pass
        else:
            with os.fdopen(handle, "w", encoding="ascii") as out:
                out.write(uuid.uuid4().hex + "\n")
                out.flush()
                os.fsync(out.fileno())
    text = path.read_text(encoding="ascii", errors="replace").strip()
    if len(text) != 32 or any(c not in "0123456789abcdef" for c in text):
        raise InputError(f"{path} does not hold a workspace identity (32 hexadecimal digits, written by lotgate); "
                         "restore it from the workspace's backup: the results store knows the workspace by it")
    return text


def lock_key(identity: str) -> int:
    """A 32-bit signed key for PostgreSQL's two-key advisory locks, from the workspace identity."""
    return int.from_bytes(hashlib.sha256(identity.encode("ascii")).digest()[:4], "big", signed=True)
