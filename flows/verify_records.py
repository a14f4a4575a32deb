"""``lotgate verify --workspace DIR`` and ``--archive DIR``: the store, its checkpoints and the archive.

Each check prints one line, VALID or INVALID with what it found in words (table, key, what
differs; checkpoint, record, hash; archived file, recorded and actual SHA-256).
"""

from __future__ import annotations

from pathlib import Path

SHOWN = 25  # findings listed per check; the rest counted


def _lines(ok: bool, head: str, problems: tuple[str, ...] | list[str]) -> list[tuple[bool, str]]:
    out = [(ok, head)]
    out += [(False, f"  {p}") for p in problems[:SHOWN]]
    if len(problems) > SHOWN:
        out.append((False, f"  … and {len(problems) - SHOWN} more"))
    return out


def workspace_findings(root: Path, *, archive: Path | None = None, with_archive: bool = True) -> list[tuple[bool, str]]:
    """(ok, line) for each check of a workspace's records."""
    from pipeline.night.open import open_records
    from pipeline.night.seal import checkpoint_folders
    from pipeline.records import archive_files, audit, checkpoints, store_check

    ws, store = open_records(root)
    out: list[tuple[bool, str]] = []
    trail = audit.verify_trail(store, ws.log)
    out.append((trail.valid, f"audit trail: {trail.reason}"))
    rows = store_check.check_rows(store)
    out += _lines(rows.valid, f"record rows: {rows.rows} rows in {rows.tables} tables, "
                  + ("each matching its hash and named by the audit event that wrote it" if rows.valid
                     else f"{len(rows.problems)} found changed, inserted or deleted outside lotgate:"),
                  [str(p) for p in rows.problems])
    signed, wrong = store_check.check_person_signatures(store)
    out += _lines(not wrong, f"person's signatures: {signed} decisions signed by a person, "
                  + ("each signature valid for its record" if not wrong else f"{len(wrong)} not valid:"), wrong)
    bare = store_check.unprotected_tables(store)
    out.append((not bare, "append-only triggers: " + ("in place on every record table" if not bare else
                                                      f"missing on {', '.join(bare)} (someone removed them)")))
    # The plant's configured anchor only (never a file found beside the records); none configured:
    # a checkpoint cannot be tied to the system identity, and says so.
    roots = [_load_root(ws.trust_root)] if ws.trust_root is not None and ws.trust_root.exists() else []
    seals = checkpoints.check_store(store, checkpoint_folders(ws), roots)
    out += _lines(seals.valid, f"checkpoints: {seals.checkpoints} found; {seals.latest}" if seals.valid
                  else f"checkpoints: {len(seals.problems)} of {seals.checkpoints} disagree with the store:",
                  list(seals.problems))
    if with_archive or archive is not None:
        folder = archive or ws.archive
        kept = archive_files.check_archive(ws.root, folder, store.files())
        out += _lines(kept.valid, f"archive {folder}: {kept.files} archived files"
                      + (", each read-only with its recorded SHA-256" if kept.valid else ", problems:"),
                      list(kept.problems))
    store.engine.dispose()
    return out


def _load_root(path: Path):
    from pyhanko.keys import load_cert_from_pemder

    return load_cert_from_pemder(str(path))


def verify_workspace(root: Path, archive: Path | None, console) -> bool:
    """Print each finding; True when every check holds."""
    findings = workspace_findings(root, archive=archive)
    for ok, line in findings:
        console.print(("    " if line.startswith("  ") else ("VALID " if ok else "INVALID ")) + line.strip(),
                      markup=False, soft_wrap=True)
    return all(ok for ok, _ in findings)
