"""Archived inputs are what was used: copied, hashed again, read-only, re-checked by ``verify --archive``.

Attacks: a hard link to an inbox file written through after archiving, an archived file edited
later, a file changed between its reading and its archiving, and a file changed while it was read.
Nights here are small demo-plant nights (one lipase and one protease lot) run without Prefect.
"""

from __future__ import annotations

import datetime as dt
import os
import stat

from flows import nightly
from flows.cli import build_parser
from pipeline.demo import plant as demo
from pipeline.night import close, receive
from pipeline.night.open import signer_for
from pipeline.records.demo_trust import create_demo_trust
from pipeline.records.store import Store
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.vocabulary import ProblemCode


def _workspace(root):
    night = demo.build_scenario(first_night=dt.date(2026, 10, 5), nights=1, lipase_per_night=1,
                                protease_per_night=1)[0]
    (root / "inbox").mkdir(parents=True)
    for name, data in night.files.items():
        (root / "inbox" / name).write_bytes(data)
    create_demo_trust(root / "keys", "Tarnwick Bioprocess test plant")  # its anchor, system identity, register
    (root / "keys" / "use-demo-identity").touch()
    write_settings(root, {"time_zone": "UTC", "trust": {"root_ca": "keys/root-ca.pem"},
                          "signer_register": "keys/signers.yaml"})
    ws = open_workspace(root)
    ws.make_folders()
    return ws, Store(ws.database_url)


def verify(capsys, *args) -> tuple[int, str]:
    parsed = build_parser().parse_args(["verify", *args])
    code = parsed.func(parsed)
    return code, capsys.readouterr().out


def test_archived_copies_share_no_inode_and_edits_are_found(tmp_path, capsys):
    ws, store = _workspace(tmp_path / "ws")
    registry = next(p for p in (ws.inbox).iterdir() if p.name.startswith("lots-"))
    link = tmp_path / "instrument-share" / registry.name
    link.parent.mkdir()
    os.link(registry, link)  # the exporting instrument keeps a hard link to the file it wrote
    summary = nightly.run_stages(ws, store, signer_for(ws), orchestrated=False)
    assert summary.received == summary.archived + summary.quarantined and summary.quarantined == 0
    archived = {f.file_name: ws.root / f.stored_as for f in store.files() if f.status == "archived"}
    assert list(ws.inbox.iterdir()) == []
    copy = archived[registry.name]
    assert copy.stat().st_ino != link.stat().st_ino and link.stat().st_nlink == 1
    assert all(stat.S_IMODE(p.stat().st_mode) == 0o444 for p in archived.values())
    with open(link, "ab") as handle:  # written through the link after archiving
        handle.write(b"LLC-2610-999,LLC-200,2026-10-01,2026-10-05,forged\n")
    code, out = verify(capsys, "--archive", str(ws.archive))
    assert code == 0, out
    assert f"VALID archive {ws.archive}: {len(archived)} archived files, each read-only" in out

    copy.chmod(0o644)  # someone with rights on the folder edits an archived file
    copy.write_bytes(copy.read_bytes().replace(b"2026-10", b"2026-09", 1))
    code, out = verify(capsys, "--workspace", str(ws.root))
    assert code == 1
    assert f"{copy.relative_to(ws.root)} (received as {registry.name}, night 1)" in out
    assert "the archived file was changed" in out


def test_a_file_changed_after_it_was_read_is_quarantined_not_archived(tmp_path, monkeypatch, capsys):
    ws, store = _workspace(tmp_path / "ws")
    target = sorted(p.name for p in ws.inbox.iterdir() if p.name.startswith("lims-"))[0]
    real_copy = close.archive_files.stage_copy

    def copy_after_an_edit(source, folder):
        if source.name == target:  # the LIMS rewrites the file while the night runs
            with open(source, "ab") as handle:
                handle.write(b"\n")
        return real_copy(source, folder)

    monkeypatch.setattr(close.archive_files, "stage_copy", copy_after_an_edit)
    summary = nightly.run_stages(ws, store, signer_for(ws), orchestrated=False)
    assert summary.received == summary.archived + summary.quarantined and summary.quarantined == 1
    [row] = [f for f in store.files() if f.file_name == target]
    assert row.status == "quarantined" and f"[{ProblemCode.CHANGED_WHILE_READ}]" in row.reason
    assert "after lotgate read it, before it was archived" in row.reason
    kept = ws.root / row.stored_as
    assert kept.read_bytes().endswith(b"\n\n") and (kept.parent / (kept.name + ".reason.txt")).exists()
    assert not (ws.inbox / target).exists()
    code, out = verify(capsys, "--workspace", str(ws.root))
    assert code == 0, out


def test_a_file_changed_while_it_was_read_is_set_aside(tmp_path, monkeypatch):
    ws, store = _workspace(tmp_path / "ws")
    target = sorted(p.name for p in ws.inbox.iterdir() if p.name.startswith("lims-"))[0]
    real_hash = receive.sha256_file

    def hash_then_append(path):
        digest = real_hash(path)
        if path.name == target:  # still being written when the night hashed it
            with open(path, "ab") as handle:
                handle.write(b"\n")
        return digest

    monkeypatch.setattr(receive, "sha256_file", hash_then_append)
    summary = nightly.run_stages(ws, store, signer_for(ws), orchestrated=False)
    assert [name for name, _ in summary.quarantine_reasons] == [target]
    assert "it changed while lotgate read it" in summary.quarantine_reasons[0][1]
    [row] = [f for f in store.files() if f.file_name == target]
    assert row.status == "quarantined" and f"[{ProblemCode.CHANGED_WHILE_READ}]" in row.reason
