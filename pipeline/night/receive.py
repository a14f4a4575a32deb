"""Receiving the night's exports: every file in the inbox read and validated, or set aside with its reason.

An entry is set aside (quarantined) when it is a link, a named pipe, socket or device (never
opened), hidden, too large, a byte-for-byte copy of a file already used, or fails its layout's
checks; its reason lies beside it and in the store. Every entry is recorded (name, SHA-256,
where it will lie) before anything moves it, so a run killed between the two finishes the move
on restart. A large inbox is parsed across all cores.
"""

from __future__ import annotations

import dataclasses
import errno
import hashlib
import os
import shutil
import stat
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.controlled.catalog import Catalog
from pipeline.errors import InputError
from pipeline.intake.assembly import Assembly, QuarantinedFile, assemble
from pipeline.intake.layouts import ExportLayout, layout_for
from pipeline.intake.problems import ExportRejected, printable
from pipeline.intake.validation import ParsedExport, parse_exports
from pipeline.night.progress import Progress, no_progress
from pipeline.night.workers import parse_files, parser_start, process_pool
from pipeline.records import audit
from pipeline.records.controlled_files import sha256_file
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write, unique_target
from pipeline.vocabulary import ProblemCode

PARSE_CHUNK_FILES = 50        # files read and validated per call of parse_exports
PARALLEL_FROM_FILES = 100     # below this, worker processes cost more than they save
STORED_NAME_BYTES = 200       # a stored name, its '.NN' counter and '.reason.txt' stay within 255 bytes
SPECIAL_KINDS = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISSOCK, "a socket"),
                 (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"))


@dataclass
class Intake:
    night_id: int
    received: int
    parsed: list[ParsedExport] = field(default_factory=list)
    paths: dict[str, Path] = field(default_factory=dict)
    quarantined: list[QuarantinedFile] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    carried: list[QuarantinedFile] = field(default_factory=list)  # set aside by an interrupted run


def quarantine_record(ws: Workspace, night_id: int, file_name: str, sha: str, status: str, reason: str,
                      stored_as: str, **extra: object) -> tuple[dict[str, object], dict[str, object]]:
    """The store row and the audit event of a file set aside."""
    row = dict(file_name=file_name, sha256=sha, kind=None, layout_version=None, status=status, reason=reason,
               stored_as=stored_as)
    return row, audit.event("file-quarantined", time_zone=ws.time_zone, night_id=night_id, file=file_name,
                            sha256=sha, status=status, stored_as=stored_as, reason=reason, **extra)


def stored_name(name: str) -> str:
    """The name a file is stored under: its own, or, when longer than STORED_NAME_BYTES, its start
    followed by '~' and 16 hexadecimal digits of the SHA-256 of the whole name."""
    raw = os.fsencode(name)
    if len(raw) <= STORED_NAME_BYTES:
        return name
    head = raw[:STORED_NAME_BYTES - 17].decode("utf-8", errors="ignore")
    return f"{head}~{hashlib.sha256(raw).hexdigest()[:16]}"


def check_folders_writable(ws: Workspace) -> None:
    """A set-up error, before anything is recorded or moved, when lotgate cannot move files out of the inbox."""
    for folder in (ws.inbox, ws.quarantine, ws.archive):
        if not os.access(folder, os.W_OK | os.X_OK):
            raise InputError(f"lotgate cannot move files in {folder} (the folder is read-only for the user "
                             "running the night); nothing was received. Give that user write access to the "
                             "workspace's inbox, quarantine and archive folders, then run the night again.")


def place_aside(source: Path, target: Path, report: str) -> None:
    """Move a recorded entry to its place in quarantine (renamed, never opened), then write its reason beside it."""
    try:
        os.rename(source, target)
    except OSError as exc:  # another file system: a file or link is copied, a special entry stays
        if exc.errno != errno.EXDEV or _special_kind(source):
            raise
        shutil.move(str(source), str(target))
    atomic_write(target.with_name(target.name + ".reason.txt"), report.encode("utf-8"))


def _quarantine(ws: Workspace, store: Store, intake: Intake, path: Path, sha: str, status: str, report: str,
                text: str) -> None:
    """Record a file set aside (name, SHA-256, where it will lie, why), then move it there with its reason."""
    short = stored_name(path.name)
    target = unique_target(ws.quarantine, short)
    if short != path.name:
        report += (f"- its name has {len(os.fsencode(path.name))} bytes, too long to be stored with its reason "
                   f"beside it; it is stored as {target.name}; its full name is {printable(path.name, 255)}\n")
    row, event = quarantine_record(ws, intake.night_id, path.name, sha, status, report.strip(),
                                   str(target.relative_to(ws.root)))
    store.record_files(intake.night_id, [row], [event])  # recorded first: a restart finishes the move
    place_aside(path, target, report)
    intake.quarantined.append(QuarantinedFile(path.name, sha, report.strip(), text))


def receive(ws: Workspace, store: Store, layouts: dict[str, ExportLayout], night_id: int,
            progress: Progress = no_progress, carried: list[QuarantinedFile] | None = None) -> Intake:
    """Read and validate every file in the inbox; set aside, with its reason, what cannot be used.

    Every entry of the inbox is counted: hidden files, symbolic links (a link's target could
    change after it is archived), named pipes, sockets and devices are set aside too; a folder is
    left in place and named.
    """
    entries = sorted(ws.inbox.iterdir())
    intake = Intake(night_id=night_id, received=0, carried=list(carried or []))
    folders = {e for e in entries if stat.S_ISDIR(e.lstat().st_mode)}
    intake.notes += [f"the inbox holds a folder '{e.name}'; lotgate reads files only, it was left in place"
                     for e in sorted(folders)]
    files = [e for e in entries if e not in folders]
    intake.received = len(files)
    done = 0

    def one_more() -> None:
        nonlocal done
        done += 1
        progress("receive", done, len(files))

    largest = max(layout.max_bytes for layout in layouts.values())
    candidates: list[tuple[Path, str]] = []
    for path in files:
        reason = _unusable(path, layouts, largest)
        if reason is None:
            candidates.append((path, sha256_file(path)))
            continue
        head = b""
        if stat.S_ISREG(path.lstat().st_mode):
            with open(path, "rb") as handle:  # the start only: enough to name the lots it mentions
                head = handle.read(1 << 16)
        digest = _entry_digest(path)
        _quarantine(ws, store, intake, path, digest, "quarantined",
                    f"File {path.name} was set aside (quarantined) and not used.\n\n- {reason}\n",
                    head.decode("utf-8", errors="replace"))
        one_more()
    to_parse = _set_aside_copies(ws, store, intake, candidates, one_more)
    received = []
    for chunk, results in parse_in_chunks(to_parse, layouts):
        for (path, sha), result in zip(chunk, results, strict=True):
            if isinstance(result, ExportRejected):
                _quarantine(ws, store, intake, path, sha, "quarantined", result.report(),
                            path.read_bytes().decode("utf-8", errors="replace"))
            elif result.sha256 != sha:  # the bytes read are not the bytes hashed a moment before
                _quarantine(ws, store, intake, path, sha, "quarantined", changed_report(path.name, sha, result.sha256), "")
            else:
                intake.parsed.append(result)
                intake.paths[path.name] = path
                received.append(audit.event("file-received", time_zone=ws.time_zone, night_id=night_id,
                                            file=path.name, sha256=sha, export_kind=result.kind,
                                            layout_version=result.layout_version,
                                            layout_sha256=result.layout_sha256, rows=len(result.frame),
                                            conversions=list(result.conversions)))
            one_more()
    store.add_events(received)
    audit.sync_log(store, ws.log)
    return intake


def changed_report(name: str, before: str, after: str, when: str = "while lotgate read it") -> str:
    """The reason of a file whose bytes changed between two readings (still being written, or edited)."""
    return (f"File {name} was set aside (quarantined) and not used.\n\n- [{ProblemCode.CHANGED_WHILE_READ}] it changed "
            f"{when}: SHA-256 {before[:16]}… first, {after[:16]}… then; it was probably still being written. Export "
            "it again once the instrument or LIMS has finished writing it\n")


def _special_kind(path: Path) -> str | None:
    """'a named pipe (FIFO)', 'a socket', 'a character device', 'a block device', or None (from lstat: nothing opened)."""
    mode = path.lstat().st_mode
    return next((name for test, name in SPECIAL_KINDS if test(mode)), None)


def _entry_digest(path: Path) -> str:
    """SHA-256 of a file's bytes (streamed), of a link's target text, or of a special entry's kind and name."""
    if path.is_symlink():
        return hashlib.sha256(os.readlink(path).encode()).hexdigest()
    special = _special_kind(path)
    if special:
        return hashlib.sha256(f"{special}: {path.name}".encode("utf-8", errors="surrogateescape")).hexdigest()
    return sha256_file(path)


def _unusable(path: Path, layouts: dict[str, ExportLayout], largest: int) -> str | None:
    """Why an entry cannot be an export (a link, a pipe, socket or device, hidden, too large), or None."""
    if path.is_symlink():
        return "it is a symbolic link; export the file itself into the inbox (a link's target can change later)"
    special = _special_kind(path)
    if special:
        return f"it is {special}, not a file; lotgate set it aside without opening it (reading it could wait for ever)"
    if path.name.startswith("."):
        return "it is a hidden file (its name starts with '.'), not an export"
    layout = layout_for(path.name, layouts)
    limit = layout.max_bytes if layout is not None else largest
    size = path.stat().st_size
    if size > limit:
        return f"the file has {size:,} bytes; {'a ' + layout.kind + ' export' if layout else 'an export'} may have at most {limit:,}"
    return None


def _set_aside_copies(ws: Workspace, store: Store, intake: Intake, candidates: list[tuple[Path, str]],
                      one_more: Callable[[], None]) -> list[tuple[Path, str]]:
    """Set aside byte-for-byte copies of a file archived earlier or received tonight; return the rest."""
    archived = store.archived_files([sha for _, sha in candidates])
    seen: dict[str, str] = {}
    to_parse: list[tuple[Path, str]] = []
    for path, sha in candidates:
        earlier = archived.get(sha)
        if earlier is None and sha not in seen:
            seen[sha] = path.name
            to_parse.append((path, sha))
            continue
        first = earlier.file_name if earlier is not None else seen[sha]
        when = f" (received {earlier.received_at_utc:%Y-%m-%d %H:%M} UTC)" if earlier is not None else " tonight"
        report = (f"File {path.name} was set aside (quarantined) and not used.\n\n- it is byte for byte "
                  f"identical (SHA-256 {sha[:16]}…) to {first}{when}, which was already processed\n")
        # A copy of a file used tonight takes nothing away; a copy of an earlier night's file
        # may be what a lot needed, so its text links it to the lots it names.
        text = path.read_bytes().decode("utf-8", errors="replace") if earlier is not None else ""
        _quarantine(ws, store, intake, path, sha, "duplicate", report, text)
        one_more()
    return to_parse


def parse_in_chunks(to_parse: list[tuple[Path, str]],
                    layouts: dict[str, ExportLayout]) -> Iterator[tuple[list[tuple[Path, str]], list[ParsedExport | ExportRejected]]]:
    """(chunk, verdicts) in the inbox's order; a large inbox is parsed across all cores.

    The tables come back to this process; the parsing's own working memory stays in the workers.
    """
    chunks = [to_parse[start:start + PARSE_CHUNK_FILES] for start in range(0, len(to_parse), PARSE_CHUNK_FILES)]
    cores = os.cpu_count() or 1
    if cores < 2 or len(to_parse) < PARALLEL_FROM_FILES:
        for chunk in chunks:
            yield chunk, parse_exports([(path.name, path.read_bytes()) for path, _ in chunk], layouts)
        return
    with process_pool(cores, parser_start, (layouts,)) as pool:
        yield from zip(chunks, pool.map(parse_files, [[str(path) for path, _ in chunk] for chunk in chunks]),
                       strict=True)


def assemble_intake(intake: Intake, catalog: Catalog) -> Assembly:
    """The night's parsed exports grouped by lot and plate (see pipeline.assembly)."""
    assembly = assemble(intake.parsed, [*intake.carried, *intake.quarantined], catalog)
    assembly.notes[:0] = intake.notes
    # Keep names, not rows: a copied empty table, since an empty slice would still hold the rows' memory.
    intake.parsed = [dataclasses.replace(p, frame=p.frame.iloc[0:0].copy()) for p in intake.parsed]
    return assembly
