"""The archive of used inputs: copies (never the inbox's inode), hashed after the copy, read-only.

``stage_copy`` copies an inbox file into a temporary file in its archive folder, flushes it and
hashes the copy as written on disk; ``place`` makes it read-only (0444) and renames it into place.
A copy shares no inode with the inbox file, so a hard link to the inbox file, written through
after archiving, cannot change the archive. ``check_archive`` re-reads every archived file the
store records and compares its SHA-256 with the record (``lotgate verify --archive``).
"""

from __future__ import annotations

import hashlib
import os
import stat
import tempfile
from dataclasses import dataclass
from pathlib import Path

from pipeline.records.stored import StoredFile

READ_ONLY = 0o444
BLOCK = 1 << 20


def stage_copy(source: Path, folder: Path) -> tuple[Path, str]:
    """Copy ``source`` to a temporary file in ``folder`` (flushed to disk); the copy's path and its SHA-256."""
    folder.mkdir(parents=True, exist_ok=True)
    handle, tmp = tempfile.mkstemp(prefix=f".{source.name[:80]}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(handle, "wb") as out, open(source, "rb") as inp:
            while block := inp.read(BLOCK):
                out.write(block)
            out.flush()
            os.fsync(out.fileno())
        return Path(tmp), sha256_of(Path(tmp))
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(BLOCK):
            digest.update(block)
    return digest.hexdigest()


def place(tmp: Path, target: Path) -> None:
    """Make the staged copy read-only and rename it to ``target`` (never over an existing file)."""
    os.chmod(tmp, READ_ONLY)
    if os.path.lexists(target):
        raise FileExistsError(f"{target} already exists; an archived file is never replaced")
    os.replace(tmp, target)


@dataclass(frozen=True)
class ArchiveCheck:
    files: int
    problems: tuple[str, ...]

    @property
    def valid(self) -> bool:
        return not self.problems


def check_archive(root: Path, archive: Path, recorded: list[StoredFile]) -> ArchiveCheck:
    """Every archived file the store records: present, a regular file, read-only, with its recorded SHA-256;
    and no file in the archive that no record names."""
    problems = []
    named = set()
    count = 0
    for row in recorded:
        if row.status != "archived":
            continue
        count += 1
        path = root / row.stored_as
        named.add(path.resolve())
        where = f"{row.stored_as} (received as {row.file_name}, night {row.night_id})"
        if not os.path.lexists(path):
            problems.append(f"{where}: missing from the archive")
            continue
        mode = path.lstat().st_mode
        if not stat.S_ISREG(mode):
            problems.append(f"{where}: not a regular file (a link or another kind of entry replaced it)")
            continue
        actual = sha256_of(path)
        if actual != row.sha256:
            problems.append(f"{where}: its SHA-256 is {actual[:16]}…, the record says {row.sha256[:16]}…: "
                            "the archived file was changed")
        elif mode & 0o222:
            problems.append(f"{where}: content as recorded, but the file is writable (mode {stat.S_IMODE(mode):o}); "
                            "archived inputs are kept read-only")
    if archive.is_dir():
        for path in sorted(archive.rglob("*")):
            if path.is_file() and not path.name.startswith(".") and path.resolve() not in named:
                problems.append(f"{path.relative_to(root)}: in the archive but named by no record")
    return ArchiveCheck(count, tuple(problems))
