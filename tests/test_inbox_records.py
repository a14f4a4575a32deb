"""Every inbox entry is recorded before anything moves it; a kill between the two loses nothing.

Attacks: a run killed between the record and the move (and between the move and the reason
file), a 255-byte file name, named pipes, sockets and devices in the inbox, a read-only inbox.
"""

import hashlib
import json
import os
import signal
import socket
import stat

import pytest

from flows import nightly
from pipeline.errors import InputError
from pipeline.night import receive
from pipeline.records.store import Store
from pipeline.records.workspace import open_workspace
from pipeline.records.workspace_id import workspace_id

LONG_NAME = "x" * 251 + ".csv"  # 255 bytes: the longest name Linux allows (NAME_MAX)


class Killed(BaseException):
    """Stands for SIGKILL at a chosen point: nothing after it runs, no handler sees it."""


def _workspace(root, entries):
    (root / "inbox").mkdir(parents=True)
    for name, data in entries.items():
        (root / "inbox" / name).write_bytes(data)
        os.utime(root / "inbox" / name, (1e9, 1e9))  # exported in 2001: a move keeps that time
    ws = open_workspace(root)
    ws.make_folders()
    return ws, Store(ws.database_url)


def _night(ws, store):
    """One night without Prefect; nothing here is released, so no signer is needed.

    A blocking read would hang the test: an alarm turns it into a failure after 60 s.
    """
    def blocked(*_):
        raise AssertionError("the night blocked on an inbox entry")

    previous = signal.signal(signal.SIGALRM, blocked)
    signal.alarm(60)
    try:
        return nightly.run_stages(ws, store, None, orchestrated=False)
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


def _garbage(n):
    """Files no export layout accepts, each set aside; two of them byte for byte the same."""
    files = {f"export-{i:02d}.csv": f"not an export {i}\n".encode() for i in range(n)}
    files["export-copy.csv"] = files["export-00.csv"]
    files[".hidden.csv"] = b"hidden\n"
    return files


def _sha(data):
    return hashlib.sha256(data).hexdigest()


def _kill_in_record_files(monkeypatch, store):
    real = store.record_files
    calls = []

    def record_files(*args, **kwargs):
        calls.append(1)
        if len(calls) == 3:  # dies while storing the third entry's record
            raise Killed
        return real(*args, **kwargs)

    monkeypatch.setattr(store, "record_files", record_files)


def _kill_before_move(monkeypatch, store):
    def place_aside(*_):
        raise Killed  # the record is committed; the entry is still in the inbox

    monkeypatch.setattr(receive, "place_aside", place_aside)


def _kill_before_reason(monkeypatch, store):
    real = receive.atomic_write

    def atomic_write(path, data, **kwargs):
        if path.name.endswith(".reason.txt"):
            raise Killed  # moved into quarantine, its reason not yet beside it
        return real(path, data, **kwargs)

    monkeypatch.setattr(receive, "atomic_write", atomic_write)


@pytest.mark.parametrize("kill", [_kill_in_record_files, _kill_before_move, _kill_before_reason],
                         ids=["while-recording", "after-record-before-move", "after-move-before-reason"])
def test_a_night_killed_around_a_move_leaves_every_entry_recorded_and_in_its_place(tmp_path, monkeypatch, kill):
    entries = _garbage(21)  # 24 entries
    ws, store = _workspace(tmp_path / "w", entries)
    with monkeypatch.context() as patch:
        kill(patch, store)
        with pytest.raises(Killed):
            _night(ws, store)
    _night(ws, Store(ws.database_url))  # the restart
    store = Store(ws.database_url)
    files = store.files()
    assert sorted(f.sha256 for f in files) == sorted(_sha(d) for d in entries.values())
    assert sorted(f.file_name for f in files) == sorted(entries)
    assert list(ws.inbox.iterdir()) == []
    for row in files:
        assert (ws.root / row.stored_as).read_bytes() == entries[row.file_name]
        assert (ws.root / (row.stored_as + ".reason.txt")).read_text(encoding="utf-8").strip() == row.reason
    assert store.unfinished_nights(workspace_id(ws.root)) == []


def test_a_255_byte_name_is_stored_shortened_and_recorded_with_its_full_name(tmp_path):
    ws, store = _workspace(tmp_path / "w", {LONG_NAME: b"not an export\n", "y" * 251 + ".csv": b"not an export\n"})
    summary = _night(ws, store)
    assert (summary.received, summary.quarantined) == (2, 2)
    by_name = {f.file_name: f for f in store.files()}
    assert set(by_name) == {LONG_NAME, "y" * 251 + ".csv"}
    stored = ws.root / by_name[LONG_NAME].stored_as
    assert len(os.fsencode(stored.name)) <= receive.STORED_NAME_BYTES and stored.read_bytes() == b"not an export\n"
    reason = stored.with_name(stored.name + ".reason.txt").read_text(encoding="utf-8")
    assert "its name has 255 bytes" in reason and f"stored as {stored.name}" in reason and LONG_NAME in reason
    # The same name again (a second night): stored beside the first under a counter, still recorded.
    (ws.inbox / LONG_NAME).write_bytes(b"another\n")
    _night(ws, store)
    assert [f.file_name for f in store.files()].count(LONG_NAME) == 2
    assert all((ws.root / f.stored_as).exists() for f in store.files())


def test_a_long_named_export_is_archived_under_a_shortened_name():
    assert receive.stored_name("lots-" + "a" * 250) != "lots-" + "a" * 250
    short = receive.stored_name("lots-" + "a" * 250)
    assert short.startswith("lots-aaa") and len(short.encode()) == receive.STORED_NAME_BYTES
    assert receive.stored_name("lots-é" * 50) != receive.stored_name("lots-é" * 50 + "x")  # distinct names stay distinct
    assert receive.stored_name("lots-1.csv") == "lots-1.csv"


def test_pipes_sockets_and_devices_are_counted_and_set_aside_without_being_opened(tmp_path, monkeypatch):
    ws, store = _workspace(tmp_path / "w", {"export-01.csv": b"not an export\n"})
    os.mkfifo(ws.inbox / "lots-pipe.csv")
    monkeypatch.chdir(ws.inbox)  # a socket's path must be short (108 bytes): bind it by a relative name
    server = socket.socket(socket.AF_UNIX)
    server.bind("lots-socket.csv")
    kinds = {"lots-pipe.csv": "a named pipe (FIFO)", "lots-socket.csv": "a socket"}
    try:
        os.mknod(ws.inbox / "lots-device.csv", stat.S_IFCHR | 0o600, os.makedev(1, 3))  # the null device
        kinds["lots-device.csv"] = "a character device"
    except PermissionError:  # not allowed to make device nodes here: pipes and sockets still tested
        pass
    try:
        summary = _night(ws, store)
    finally:
        server.close()
    assert (summary.received, summary.quarantined) == (1 + len(kinds), 1 + len(kinds))
    rows = {f.file_name: f for f in store.files()}
    for name, kind in kinds.items():
        assert f"it is {kind}, not a file" in rows[name].reason
        assert not (ws.inbox / name).exists()
        moved = ws.root / rows[name].stored_as
        assert not stat.S_ISREG(moved.lstat().st_mode) and moved.with_name(moved.name + ".reason.txt").is_file()


def test_a_read_only_inbox_is_a_set_up_error_before_anything_moves(tmp_path, monkeypatch):
    entries = _garbage(3)
    ws, store = _workspace(tmp_path / "w", entries)
    real = os.access
    # The tests run as root, whom permissions do not stop; os.access is what a non-root user's night asks.
    monkeypatch.setattr(os, "access", lambda path, mode, **kw: False if path == ws.inbox else real(path, mode, **kw))
    with pytest.raises(InputError, match=f"lotgate cannot move files in {ws.inbox}"):
        _night(ws, store)
    assert sorted(p.name for p in ws.inbox.iterdir()) == sorted(entries)
    assert list(ws.quarantine.iterdir()) == [] and store.files() == []


def test_a_move_refused_after_the_record_leaves_no_copy_and_the_restart_finishes_it(tmp_path, monkeypatch):
    entries = _garbage(3)
    ws, store = _workspace(tmp_path / "w", entries)
    with monkeypatch.context() as patch:
        def refused(*_):
            raise PermissionError(13, "Permission denied")

        patch.setattr(os, "rename", refused)
        with pytest.raises(PermissionError):
            _night(ws, store)
    assert list(ws.quarantine.iterdir()) == []  # no copy: a refused rename is not retried as copy + delete
    assert len(store.files()) == 1  # the one entry whose move was refused is recorded
    _night(ws, store)
    assert sorted(f.file_name for f in store.files()) == sorted(entries)
    assert list(ws.inbox.iterdir()) == []


def _kinetic_read(plate, reads):
    rows = "".join(f"{plate},A01,{8 * k},{0.06 + 0.0001 * k:.4f},405,30.0\n" for k in range(reads))
    return ("plate_id,well,time_s,absorbance,wavelength_nm,temperature_c\n" + rows).encode()


def test_a_read_over_its_layouts_reads_cap_is_quarantined_and_the_layout_is_recorded_with_its_sha256(tmp_path):
    from pipeline.records.controlled_files import shipped_folders

    over, within = _kinetic_read("CAP-OVER", 10_001), _kinetic_read("CAP-IN", 10_000)  # the shipped cap: 10,000
    ws, store = _workspace(tmp_path / "w", {"kinread-CAP-OVER.csv": over, "kinread-CAP-IN.csv": within})
    summary = _night(ws, store)
    reasons = dict(summary.quarantine_reasons)
    assert set(reasons) == {"kinread-CAP-OVER.csv"}
    words = "well A01 of plate CAP-OVER has 10,001 reads; the kinetic-read 1.2 layout allows at most 10,000 reads per well"
    assert words in reasons["kinread-CAP-OVER.csv"]
    assert words in (ws.quarantine / "kinread-CAP-OVER.csv.reason.txt").read_text(encoding="utf-8")
    layout_sha = _sha((shipped_folders().layouts / "kinetic-read.yaml").read_bytes())
    received = [json.loads(e.body) for e in store.audit_events(after_seq=0, limit=1000)]
    received = [e for e in received if e["kind"] == "file-received"]
    assert [(e["file"], e["layout_version"], e["layout_sha256"]) for e in received] == \
        [("kinread-CAP-IN.csv", "1.2", layout_sha)]
