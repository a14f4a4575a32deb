"""What differs between two revisions of a lot's decision, in a line a reviewer reads (pure)."""

from __future__ import annotations

from pipeline.release.records import DecisionRecord


def change_note(before: DecisionRecord, after: DecisionRecord) -> str:
    """Input files added, dropped or changed; specification version; reported results; disposition."""
    notes = []
    old_files, new_files = before.input_files, after.input_files
    added = sorted(set(new_files) - set(old_files))
    removed = sorted(set(old_files) - set(new_files))
    changed = sorted(n for n in set(old_files) & set(new_files) if old_files[n] != new_files[n])
    if added:
        notes.append(f"new input files {', '.join(added)}")
    if removed:
        notes.append(f"input files no longer used {', '.join(removed)}")
    if changed:
        notes.append(f"changed content of {', '.join(changed)}")
    if before.spec_version != after.spec_version:
        notes.append(f"specification v{before.spec_version} → v{after.spec_version}")
    old_results = {r.code: r.reported for r in before.results}
    moved = [f"{r.code} {old_results.get(r.code)} → {r.reported}" for r in after.results
             if r.code in old_results and old_results[r.code] != r.reported]
    if moved:
        notes.append("results changed: " + "; ".join(moved))
    if before.label != after.label:
        notes.append(f"disposition {before.label} → {after.label}")
    return "; ".join(notes) or "re-evaluated with the same numbers"
