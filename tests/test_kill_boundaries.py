"""A night stopped at EVERY commit boundary, then restarted, ends with the records of a night never stopped.

The night: the last of a three-night demo whose history leaves the lipase charts six lots short
of their baseline (20), so tonight freezes limits part-way through, with lots held for every
reason before and after. For each writing commit k of the uninterrupted night, the run is
stopped just before commit k (everything written to disk before it done) and just after it
(nothing after it done), restarted, and its records compared with the uninterrupted run's,
record for record: decisions, results, chart points (in release order), limits, and the audit
events that describe them, less times, document hashes and night numbers. A few boundaries are
also cut by a real SIGKILL in a child process. On SQLite and on PostgreSQL.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
from contextlib import contextmanager
from pathlib import Path

import pytest
from sqlalchemy import create_engine, event, text
from sqlalchemy.engine import Engine

from pipeline.demo import plant as demo
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, open_workspace
from tests.test_crash import _workspace

pytestmark = pytest.mark.slow

# Kinds of audit event that describe tonight's decisions; the others describe the runs themselves
# (night opened or closed, interrupted, files received, documents removed), which a stop changes.
DECISION_EVENTS = ("limits-frozen", "results-computed", "decision", "certificate-signed")
# Keys that vary from run to run: times, hashes of documents that carry a time, night numbers.
VOLATILE = {"time_utc", "time_local", "decided_at_utc", "decided_at_local", "signed_at_utc", "sha256",
            "signer_certificate_sha256", "night_id", "frozen_at_utc", "seq", "prev_hash", "hash",
            "row_sha256"}  # a row hash covers its times


class Stop(BaseException):
    """The run stopping dead at a commit boundary (a BaseException: no handler of the night catches it)."""


class Boundaries:
    """Counts every commit that writes to any store; stops the run just before or just after commit ``at``."""

    def __init__(self, at: int | None = None, after: bool = False, action=None):
        self.at, self.after, self.action = at, after, action or self._raise
        self.count, self.wrote, self.stop_after = 0, False, False
        self.tables: list[str] = []  # per commit: the first table it wrote
        self._first_table = ""
        self._listeners = [(Engine, "before_cursor_execute", self._statement), (Engine, "commit", self._commit)]
        for target, name, fn in self._listeners:
            event.listen(target, name, fn)
        self._session = original = Store.session

        @contextmanager
        def session_then_stop(store: Store):
            with original(store) as session:
                yield session
            if self.stop_after:  # the commit is done
                self.stop_after = False
                self.action()

        Store.session = session_then_stop

    @staticmethod
    def _raise():
        raise Stop()

    def close(self) -> None:
        for target, name, fn in self._listeners:
            event.remove(target, name, fn)
        Store.session = self._session

    def _statement(self, conn, cursor, statement, parameters, context, executemany):
        words = statement.lstrip().split(None, 3)
        if words and words[0].upper() in ("INSERT", "UPDATE", "DELETE"):
            if not self.wrote:
                self._first_table = words[2 if words[0].upper() != "UPDATE" else 1].strip('"')
            self.wrote = True

    def _commit(self, conn):
        if not self.wrote:
            return
        self.wrote = False
        self.count += 1
        self.tables.append(self._first_table)
        if self.count == self.at:
            if self.after:
                self.stop_after = True
            else:
                self.action()


def _night(root: Path, boundaries: Boundaries | None = None) -> bool:
    """One night on ``root``; True when it was stopped at its boundary."""
    from flows import nightly
    from pipeline.night.open import open_night

    ws, store, signer = open_night(root)
    try:
        nightly.run_stages(ws, store, signer, orchestrated=False)
        return False
    except Stop:
        return True
    finally:
        if boundaries is not None:
            boundaries.close()
        store.engine.dispose()


def _plain(value):
    if isinstance(value, str) and value[:1] in "[{":
        try:
            return _plain(json.loads(value))
        except ValueError:
            return value
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items() if k not in VOLATILE}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    return value


def records(url: str) -> dict[str, list]:
    """The night's records, normalised: what must not depend on where a run was stopped."""
    engine = create_engine(url)
    try:
        with engine.connect() as c:
            rows = lambda sql: [dict(r._mapping) for r in c.execute(text(sql))]  # noqa: E731
            names = {r["id"]: (r["lot_id"], r["revision"]) for r in rows("select id, lot_id, revision from decisions")}
            exported = {r["decision_id"] for r in rows("select decision_id from lims_exports")}
            decisions = [_plain({**r, "id": None, "lims_export": r["id"] in exported})
                         for r in rows("select * from decisions order by lot_id, revision")]
            results = [_plain({**r, "id": None, "decision_id": names[r["decision_id"]]})
                       for r in rows("select * from results order by decision_id, attribute")]
            results.sort(key=lambda r: (r["decision_id"], r["attribute"]))
            points = [_plain({**r, "id": None, "decision_id": names[r["decision_id"]]})
                      for r in rows("select * from chart_points order by id")]
            limits = [_plain({**r, "id": None}) for r in
                      rows("select * from control_limits order by product_code, attribute, version")]
            events = [_plain(json.loads(r["body"])) for r in rows("select body from audit_events order by seq")]
    finally:
        engine.dispose()
    return {"decisions": decisions, "results": results, "chart points": points, "limits": limits,
            "events": [e for e in events if e["kind"] in DECISION_EVENTS],
            "lims exports": [e.get("decisions") for e in events if e["kind"] == "lims-results-written"]}


def differences(expected: dict[str, list], got: dict[str, list]) -> list[str]:
    out = []
    for table, rows in expected.items():
        theirs = got[table]
        if len(theirs) != len(rows):
            out.append(f"{table}: {len(theirs)} records instead of {len(rows)}")
        out += [f"{table} #{i}: {b} instead of {a}" for i, (a, b) in enumerate(zip(rows, theirs)) if a != b]
    return out


def documents_have_decisions(root: Path, url: str) -> list[str]:
    """Every certificate and report in place is named by a committed decision, with the same SHA-256."""
    import hashlib

    from pipeline.night.lot_documents import documents_named

    store = Store(url)
    named = {}
    for decision in store.decisions():
        named.update(documents_named(decision.record))
    store.engine.dispose()
    problems = []
    for folder in ("certificates", "reports"):
        for path in sorted((root / folder).glob("*")):
            relative = f"{folder}/{path.name}"
            if relative not in named:
                problems.append(f"{relative} without a committed decision")
            elif named[relative] not in (None, hashlib.sha256(path.read_bytes()).hexdigest()):
                problems.append(f"{relative} does not match its decision's SHA-256")
    return problems


def _unrecorded_quarantine(root: Path, url: str) -> list[str]:
    """Files in quarantine that the store does not record (a stopped run must never leave one)."""
    store = Store(url)
    recorded = {f.stored_as for f in store.files()}
    store.engine.dispose()
    return [p.name for p in (root / "quarantine").glob("*")
            if not p.name.endswith(".reason.txt") and f"quarantine/{p.name}" not in recorded]


class Workspaces:
    """The history workspace saved once; restored, at the same path and database, before each run."""

    def __init__(self, root: Path, saved: Path, pg_url: str | None):
        self.root, self.saved, self.pg_url = root, saved, pg_url
        self.admin = None
        if pg_url:
            self.name = pg_url.rsplit("/", 1)[1]
            self.admin = create_engine(pg_url.rsplit("/", 1)[0] + "/test", isolation_level="AUTOCOMMIT")

    @property
    def url(self) -> str:
        return self.pg_url or f"sqlite:///{self.root / 'lotgate.db'}"

    def save(self) -> None:
        shutil.copytree(self.root, self.saved)
        if self.admin is not None:
            with self.admin.connect() as c:
                c.execute(text(f'CREATE DATABASE "{self.name}_saved" TEMPLATE "{self.name}"'))

    def restore(self) -> None:
        shutil.rmtree(self.root)
        shutil.copytree(self.saved, self.root)
        if self.admin is not None:
            with self.admin.connect() as c:
                c.execute(text(f'DROP DATABASE "{self.name}" WITH (FORCE)'))
                c.execute(text(f'CREATE DATABASE "{self.name}" TEMPLATE "{self.name}_saved"'))

    def drop(self) -> None:
        if self.admin is not None:
            with self.admin.connect() as c:
                c.execute(text(f'DROP DATABASE IF EXISTS "{self.name}_saved" WITH (FORCE)'))
            self.admin.dispose()


def _history(tmp_path: Path, pg_url: str | None) -> Workspaces:
    nights = demo.build_scenario(nights=2, lipase_per_night=14, protease_per_night=4)
    spaces = Workspaces(tmp_path / "night", tmp_path / "saved", pg_url)
    _workspace(spaces.root, nights[0])
    assert not _night(spaces.root)
    for name, data in nights[1].files.items():
        atomic_write(spaces.root / "inbox" / name, data)
    spaces.save()
    return spaces


def _kill_in_child(root: Path, at: int, after: bool) -> None:
    """In a child process: run the night and SIGKILL it at boundary ``at`` (the test's entry point)."""
    Boundaries(at, after, action=lambda: os.kill(os.getpid(), signal.SIGKILL))
    _night(root)


def _every_boundary(tmp_path: Path, monkeypatch, pg_url: str | None, *, after_too: bool) -> dict[str, int]:
    """Stop before every commit (and, ``after_too``, after it, and by SIGKILL at three), restart, compare."""
    if pg_url:
        monkeypatch.setenv("LOTGATE_DATABASE_URL", pg_url)
    spaces = _history(tmp_path, pg_url)
    try:
        counter = Boundaries()
        assert not _night(spaces.root, counter)
        expected = records(spaces.url)
        assert expected["limits"] and any(e["kind"] == "limits-frozen" for e in expected["events"])
        held = [d for d in expected["decisions"] if d["disposition"] not in ("released", "ready for release")]
        assert len(held) >= 4 and len(expected["decisions"]) > len(held)
        figures = {"boundaries": counter.count, "runs": 0, "records compared": 0, "differences": 0}
        failed: list[str] = []
        cases = [(k, after, False) for k in range(1, counter.count + 1) for after in ((False, True) if after_too
                                                                                      else (False,))]
        if after_too:
            # A real SIGKILL at a few boundaries: the first decisions' commit (with tonight's limits),
            # just after a middle one (its documents still staged), and just before the last one.
            publish = [k for k, table in enumerate(counter.tables, start=1) if table in ("lots", "control_limits")]
            cases += [(publish[0], False, True), (publish[len(publish) // 2], True, True), (publish[-1], False, True)]
        for at, after, sigkill in cases:
            spaces.restore()
            where = f"{'SIGKILL ' if sigkill else ''}{'after' if after else 'before'} commit {at} ({counter.tables[at - 1]})"
            if sigkill:
                child = subprocess.run([sys.executable, "-c", "from pathlib import Path; import tests.test_kill_boundaries "
                                        f"as t; t._kill_in_child(Path({str(spaces.root)!r}), {at}, {after})"],
                                       cwd=Path(__file__).parent.parent, capture_output=True, text=True, timeout=300)
                assert child.returncode == -signal.SIGKILL, f"{where}: {child.stderr[-2000:]}"
            else:
                assert _night(spaces.root, Boundaries(at, after)), f"{where}: the run was not stopped"
            problems = [f"at the stop: {p}" for p in documents_have_decisions(spaces.root, spaces.url)]
            # Record, then move: a file in quarantine always has its record, wherever the run stopped.
            problems += [f"{name} is in quarantine without its record" for name in
                         _unrecorded_quarantine(spaces.root, spaces.url)]
            assert not _night(spaces.root), where  # the restart finishes the night
            problems += differences(expected, records(spaces.url))
            problems += documents_have_decisions(spaces.root, spaces.url)
            problems += [f"{p} left staged" for p in (spaces.root / ".staging").rglob("*") if p.is_file()]
            store = Store(spaces.url)
            if not audit.verify_trail(store, open_workspace(spaces.root).log).valid:
                problems.append("the audit trail does not verify")
            store.engine.dispose()
            figures["runs"] += 1
            figures["records compared"] += sum(len(rows) for rows in expected.values())
            figures["differences"] += len(problems)
            failed += [f"{where}: {p[:300]}" for p in problems[:2]]
        assert failed == [], f"{figures}: " + "\n".join(failed)
        return figures
    finally:
        spaces.drop()


def test_a_night_stopped_at_every_commit_boundary_ends_as_if_never_stopped_sqlite(tmp_path, monkeypatch):
    monkeypatch.delenv("LOTGATE_DATABASE_URL", raising=False)
    figures = _every_boundary(tmp_path, monkeypatch, None, after_too=True)
    print(f"SQLite: {figures}")
    assert figures["boundaries"] >= 20 and figures["runs"] == 2 * figures["boundaries"] + 3


@pytest.mark.postgres
def test_a_night_stopped_at_every_commit_boundary_ends_as_if_never_stopped_postgresql(tmp_path, monkeypatch):
    from tests.pg import fresh_database

    url, drop = fresh_database()
    try:
        # Stopped before each commit only: a stop after commit k differs from one before commit
        # k + 1 only in the files written between them, which the SQLite test covers.
        figures = _every_boundary(tmp_path, monkeypatch, url, after_too=False)
    finally:
        drop()
    print(f"PostgreSQL: {figures}")
    assert figures["boundaries"] >= 20 and figures["runs"] == figures["boundaries"]
