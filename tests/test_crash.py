"""A night killed with SIGKILL at 20 seeded moments, then restarted, loses and duplicates nothing."""

import hashlib
import os
import random
import signal
import subprocess
import sys
import time
from collections import Counter

import pytest

from pipeline.demo import plant as demo
from pipeline.records import audit
from pipeline.records.pdf_verification import verify_pdf
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, open_workspace, write_settings

pytestmark = pytest.mark.slow

KILLS = 20
SEED = 20261201


def _workspace(root, night):
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir(exist_ok=True)
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)


def _decisions(root):
    import sqlite3

    try:
        with sqlite3.connect(f"file:{root / 'lotgate.db'}?mode=ro", uri=True, timeout=0.1) as db:
            return db.execute("select count(*) from decisions").fetchone()[0]
    except sqlite3.Error:
        return 0


def _run(root, kill_after=None, after_decisions=None):
    """Run a night; kill it ``kill_after`` seconds in, or that long after ``after_decisions`` commits."""
    command = [sys.executable, "-m", "flows.cli", "run", "--workspace", str(root), "--no-orchestration"]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    if kill_after is None:
        _, err = process.communicate(timeout=300)
        assert process.returncode == 0, err[-2000:]
        return True
    if after_decisions is not None:
        while process.poll() is None and _decisions(root) < after_decisions:
            time.sleep(0.005)
    time.sleep(kill_after)
    killed = process.poll() is None
    if killed:
        os.kill(process.pid, signal.SIGKILL)
    process.communicate(timeout=60)
    return killed


def _timeline(root):
    """Run a night to the end, watching the store: when the first and last decisions were committed."""
    import sqlite3

    command = [sys.executable, "-m", "flows.cli", "run", "--workspace", str(root), "--no-orchestration"]
    start = time.monotonic()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    first = last = None
    seen = 0
    while process.poll() is None:
        time.sleep(0.02)
        try:
            with sqlite3.connect(f"file:{root / 'lotgate.db'}?mode=ro", uri=True, timeout=0.1) as db:
                count = db.execute("select count(*) from decisions").fetchone()[0]
        except sqlite3.Error:
            continue
        if count and first is None:
            first = time.monotonic() - start
        if count > seen:
            seen, last = count, time.monotonic() - start
    assert process.returncode == 0, process.stderr.read()[-2000:]
    assert first is not None and last is not None and last > first
    return first, last, time.monotonic() - start


@pytest.fixture(scope="module")
def night():
    # Two nights of the demo: the second carries the deliberate problems (a quarantined export,
    # holds of every kind); six lipase and four protease lots keep each run short.
    return demo.build_scenario(nights=2, lipase_per_night=8, protease_per_night=4)[-1]


def test_killed_nights_finish_with_nothing_lost_or_doubled(night, tmp_path):
    reference = tmp_path / "reference"
    _workspace(reference, night)
    first, last, duration = _timeline(reference)
    expected = {row.lot_id: row.record.label for row in Store(open_workspace(reference).database_url).decisions()}
    rng = random.Random(SEED)
    # Half the kills at a seeded moment anywhere in the run (start-up, reading, computing,
    # closing), half while lots are being published: a seeded few milliseconds after a seeded
    # number of decisions have been committed.
    per_lot = (last - first) / max(1, len(expected) - 1)
    points = [(rng.uniform(0.3, 0.95 * duration), None) for _ in range(KILLS // 2)]
    points += [(rng.uniform(0.0, 0.8 * per_lot), rng.randint(1, len(expected) - 1)) for _ in range(KILLS - KILLS // 2)]
    mid_publish = killed = 0
    for number, (moment, after) in enumerate(points):
        root = tmp_path / f"kill-{number:02d}"
        for attempt in range(4):  # a run faster than the reference may end before the moment
            _workspace(root, night)
            if _run(root, kill_after=moment * 0.8**attempt, after_decisions=after):
                killed += 1
                break
            import shutil
            shutil.rmtree(root)
        store = Store(open_workspace(root).database_url)
        at_kill = len(store.decisions())
        mid_publish += 0 < at_kill < len(expected)
        _run(root)  # the restart finishes the night
        rows = store.decisions()
        counts = Counter(row.lot_id for row in rows)
        assert counts and max(counts.values()) == 1, f"kill at {moment:.2f} s: a lot decided twice: {counts}"
        assert {row.lot_id: row.record.label for row in rows} == expected, f"kill at {moment:.2f} s"
        assert not any((root / "inbox").iterdir()), f"kill at {moment:.2f} s: files left in the inbox"
        archived = {p.name for p in (root / "archive").rglob("*") if p.is_file()}
        quarantined = {p.name for p in (root / "quarantine").iterdir() if not p.name.endswith(".reason.txt")}
        assert archived | quarantined == set(night.files) and not archived & quarantined, f"kill at {moment:.2f} s"
        stored = {f.file_name for f in store.files() if f.status in ("archived", "quarantined")}
        assert stored >= set(night.files), f"kill at {moment:.2f} s: files without a record"
        for pdf in (root / "certificates").glob("*.pdf"):
            assert verify_pdf(pdf, trust_roots=[root / "keys" / "root-ca.pem"]).valid, f"{pdf.name} after kill"
        assert not list(root.rglob(".*.tmp")), f"kill at {moment:.2f} s: temporary files left"
        check = audit.verify_trail(store, root / "decisions.jsonl")
        assert check.valid, f"kill at {moment:.2f} s: {check.reason}"
    assert killed == KILLS
    assert mid_publish >= 3  # several kills landed between two lots' commits


def test_a_night_cut_between_publishing_and_closing_decides_nothing_twice(night, tmp_path):
    """Deterministic form of the kill above that once found a duplicate: the interrupted night
    had already quarantined a lot's export, which the restart must still count as that lot's."""
    from flows import nightly
    from pipeline.night.decide import decide, earlier_decisions, load_charts
    from pipeline.night.evaluate import evaluate
    from pipeline.night.open import open_night
    from pipeline.night.publish import publish
    from pipeline.night.receive import assemble_intake, receive
    from pipeline.records.controlled_files import open_controlled_documents

    root = tmp_path / "cut"
    _workspace(root, night)
    ws, store, signer = open_night(root)
    catalog, layouts = open_controlled_documents(ws)
    night_id = store.start_night("test")
    intake = receive(ws, store, layouts, night_id)
    assert intake.quarantined  # the scenario's malformed LIMS export
    evaluations, _ = evaluate(assemble_intake(intake, catalog), catalog)
    charts = load_charts(store, catalog, evaluations)
    decided = decide(evaluations, catalog, charts, earlier_decisions(store, evaluations))
    publish(ws, store, catalog, decided, night_id, signer)
    first = {row.lot_id: row.fingerprint for row in store.decisions()}
    # ... the run dies here, before close: the exports are still in the inbox.
    summary = nightly.run_stages(ws, store, signer, orchestrated=False)
    assert not any(o.new for o in summary.outcomes)
    assert {row.lot_id: row.fingerprint for row in store.decisions()} == first
    assert audit.verify_trail(store, root / "decisions.jsonl").valid


def test_a_window_that_fails_to_commit_is_decided_once_on_the_restart(tmp_path, monkeypatch):
    """A large night renders on all cores and stores each window of lots in one transaction.
    A failure after a window's documents are written, before its commit, leaves them staged,
    never in place; the restart removes them, decides exactly those lots, once, and writes their files."""
    from flows import nightly
    from pipeline.night import publish
    from pipeline.night.open import open_night

    night = demo.build_scenario(nights=1, lipase_per_night=16, protease_per_night=10)[0]
    root = tmp_path / "window"
    _workspace(root, night)
    monkeypatch.setattr(publish, "WINDOW_LOTS", 8)
    commits = []
    real = Store.add_decisions

    def failing_second_window(self, writes, limits=()):
        commits.append(len(writes))
        if len(commits) == 2:
            raise RuntimeError("simulated failure before the second window's commit")
        return real(self, writes, limits)

    monkeypatch.setattr(Store, "add_decisions", failing_second_window)
    ws, store, signer = open_night(root)
    with pytest.raises(RuntimeError, match="simulated"):
        nightly.run_stages(ws, store, signer, orchestrated=False)
    stored = {row.lot_id for row in store.decisions()}
    if (os.cpu_count() or 1) > 1:
        assert commits[:2] == [8, 8] and len(stored) == 8  # one window committed, the next one not
    staged = {p.name for p in (root / ".staging" / "reports").glob("*_batch-report.pdf")}
    assert len(staged) >= commits[1]  # the failed window's documents were written, into the staging folder only
    assert {p.name for p in (root / "reports").glob("*_batch-report.pdf")} == {
        f"{row.lot_id}_r{row.revision}_batch-report.pdf" for row in store.decisions()}
    monkeypatch.setattr(Store, "add_decisions", real)
    summary = nightly.run_stages(ws, store, signer, orchestrated=False)
    rows = store.decisions()
    assert Counter(row.lot_id for row in rows).most_common(1)[0][1] == 1
    assert {row.lot_id for row in rows} == {o.lot_id for o in summary.outcomes}
    assert sum(o.new for o in summary.outcomes) == len(rows) - len(stored)
    assert {p.name for p in (root / "reports").glob("*_batch-report.pdf")} == {
        f"{row.lot_id}_r{row.revision}_batch-report.pdf" for row in rows}
    for row in rows:
        certificate = row.record.certificate
        if certificate:
            path = root / "certificates" / certificate.file
            assert hashlib.sha256(path.read_bytes()).hexdigest() == certificate.sha256
            assert verify_pdf(path, trust_roots=[root / "keys" / "root-ca.pem"]).valid
    assert not list(root.rglob(".*.tmp"))
    assert audit.verify_trail(store, root / "decisions.jsonl").valid
