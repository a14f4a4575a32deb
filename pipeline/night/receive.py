"""Receiving the night's exports: every file in the inbox read and validated, or set aside with its reason.

A file is set aside (quarantined) when it is a link, hidden, too large, a byte-for-byte copy of
a file already used, or fails its layout's checks; its reason lies beside it and in the store.
A large inbox is parsed across all cores.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.controlled.catalog import Catalog
from pipeline.intake.assembly import Assembly, QuarantinedFile, assemble
from pipeline.intake.layouts import ExportLayout, layout_for
from pipeline.intake.problems import ExportRejected
from pipeline.intake.validation import ParsedExport, parse_exports
from pipeline.night.progress import Progress, no_progress
from pipeline.night.workers import parse_files, parser_start, process_pool
from pipeline.records import audit
from pipeline.records.controlled_files import sha256_file
from pipeline.records.store import Store
from pipeline.records.workspace import Workspace, atomic_write, move_into

PARSE_CHUNK_FILES = 50        # files read and validated per call of parse_exports
PARALLEL_FROM_FILES = 100     # below this, worker processes cost more than they save


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


def _quarantine(ws: Workspace, store: Store, intake: Intake, path: Path, sha: str, status: str, report: str,
                text: str) -> None:
    """Move a file aside with its reason beside it, and record both in one transaction."""
    target = move_into(path, ws.quarantine)
    atomic_write(target.with_name(target.name + ".reason.txt"), report.encode("utf-8"))
    row, event = quarantine_record(ws, intake.night_id, path.name, sha, status, report.strip(),
                                   str(target.relative_to(ws.root)))
    store.record_files(intake.night_id, [row], [event])
    intake.quarantined.append(QuarantinedFile(path.name, sha, report.strip(), text))


def receive(ws: Workspace, store: Store, layouts: dict[str, ExportLayout], night_id: int,
            progress: Progress = no_progress, carried: list[QuarantinedFile] | None = None) -> Intake:
    """Read and validate every file in the inbox; set aside, with its reason, what cannot be used.

    Every entry of the inbox is counted: hidden files and symbolic links are set aside too (a
    link's target could change after it is archived); a folder is left in place and named.
    """
    entries = sorted(ws.inbox.iterdir())
    intake = Intake(night_id=night_id, received=0, carried=list(carried or []))
    intake.notes += [f"the inbox holds a folder '{e.name}'; lotgate reads files only, it was left in place"
                     for e in entries if e.is_dir() and not e.is_symlink()]
    files = [e for e in entries if e.is_symlink() or e.is_file()]
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
        if not path.is_symlink():
            with open(path, "rb") as handle:  # the start only: enough to name the lots it mentions
                head = handle.read(1 << 16)
        digest = (hashlib.sha256(os.readlink(path).encode()).hexdigest() if path.is_symlink()
                  else sha256_file(path))  # streamed: a large file is never held in memory
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
            else:
                intake.parsed.append(result)
                intake.paths[path.name] = path
                received.append(audit.event("file-received", time_zone=ws.time_zone, night_id=night_id,
                                            file=path.name, sha256=sha, export_kind=result.kind,
                                            layout_version=result.layout_version, rows=len(result.frame),
                                            conversions=list(result.conversions)))
            one_more()
    store.add_events(received)
    audit.sync_log(store, ws.log)
    return intake


def _unusable(path: Path, layouts: dict[str, ExportLayout], largest: int) -> str | None:
    """Why a file cannot be an export (a link, hidden, too large), or None."""
    if path.is_symlink():
        return "it is a symbolic link; export the file itself into the inbox (a link's target can change later)"
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
