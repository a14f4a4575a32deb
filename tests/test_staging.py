"""No certificate without its decision: documents are staged, the decision committed, then they are placed.

Attack: the store fails during publish after a window's documents are written (a database
outage). Before staging, signed certificates stayed in certificates/ with no decision, and a
later rerun that held such a lot left its valid certificate on disk.
"""

from __future__ import annotations

import pytest

from pipeline.demo import plant as demo
from pipeline.errors import StoreError
from pipeline.night import publish
from pipeline.night.lot_documents import documents_named
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.vocabulary import Disposition
from tests.test_crash import _workspace
from tests.test_kill_boundaries import documents_have_decisions

pytestmark = pytest.mark.slow


def _events(store: Store, kind: str) -> list[dict]:
    import json

    return [body for e in store.audit_events() if (body := json.loads(e.body))["kind"] == kind]


@pytest.fixture()
def night_root(tmp_path, monkeypatch):
    monkeypatch.delenv("LOTGATE_DATABASE_URL", raising=False)
    monkeypatch.setattr(publish, "WINDOW_LOTS", 8)
    root = tmp_path / "outage"
    _workspace(root, demo.build_scenario(nights=2, lipase_per_night=16, protease_per_night=10)[-1])
    return root


def test_a_store_outage_during_publish_leaves_no_certificate_without_its_decision(night_root, monkeypatch):
    from flows import nightly
    from pipeline.night.open import open_night

    real = Store.add_decisions
    calls = []

    def outage_from_the_second_window(self, writes, limits=()):
        calls.append(len(writes))
        if len(calls) >= 2:
            raise StoreError("the results store refused a write: OperationalError: server closed the connection")
        return real(self, writes, limits)

    monkeypatch.setattr(Store, "add_decisions", outage_from_the_second_window)
    ws, store, signer = open_night(night_root)
    with pytest.raises(StoreError):
        nightly.run_stages(ws, store, signer, orchestrated=False)
    staged = sorted(p.name for p in (night_root / ".staging" / "certificates").glob("*.pdf"))
    assert staged, "the failing window had signed certificates (written, staged)"
    assert documents_have_decisions(night_root, store.url) == []  # nothing undecided ever reached its place
    committed = {row.lot_id for row in store.decisions()}
    assert not any(name.split("_r")[0] in committed for name in staged)

    monkeypatch.setattr(Store, "add_decisions", real)
    summary = nightly.run_stages(ws, store, signer, orchestrated=False)
    rows = store.decisions()
    assert {row.lot_id for row in rows} == {o.lot_id for o in summary.outcomes}
    assert documents_have_decisions(night_root, store.url) == []
    assert not [p for p in (night_root / ".staging").rglob("*") if p.is_file()]
    held = {row.lot_id for row in rows if row.disposition != Disposition.READY_FOR_RELEASE}
    assert held and not [p for p in (night_root / "certificates").glob("*.pdf") if p.name.split("_r")[0] in held]
    released = [row for row in rows if row.disposition == Disposition.READY_FOR_RELEASE]
    assert {f"{row.lot_id}_r{row.revision}_certificate.pdf" for row in released} == {
        p.name for p in (night_root / "certificates").glob("*.pdf")}
    removed = _events(store, "document-removed")
    assert {e["file"] for e in removed} >= {f"certificates/{name}" for name in staged}
    assert all(e["sha256"] and e["reason"] for e in removed)
    assert audit.verify_trail(store, night_root / "decisions.jsonl").valid


def test_a_committed_decision_whose_documents_are_still_staged_gets_them_placed(night_root, monkeypatch):
    from flows import nightly
    from pipeline.night.open import open_night

    class Stop(BaseException):
        pass

    def stop(ws, documents):
        raise Stop()  # the run stops right after the first window's commit

    monkeypatch.setattr(publish, "place_documents", stop)
    ws, store, signer = open_night(night_root)
    with pytest.raises(Stop):
        nightly.run_stages(ws, store, signer, orchestrated=False)
    first = store.decisions()
    assert first and not list((night_root / "certificates").glob("*.pdf"))
    monkeypatch.undo()
    monkeypatch.setattr(publish, "WINDOW_LOTS", 8)
    ws, store, signer = open_night(night_root)
    nightly.run_stages(ws, store, signer, orchestrated=False)
    assert documents_have_decisions(night_root, store.url) == []
    for row in first:  # the first window's documents, committed then, are in place now
        for relative in documents_named(row.record):
            assert (night_root / relative).is_file(), relative
    assert not _events(store, "document-removed")


def test_an_orphaned_certificate_left_in_place_by_a_stopped_run_is_removed_and_recorded(night_root):
    from flows import nightly
    from pipeline.night.open import open_night

    ws, store, signer = open_night(night_root)
    store.start_night("an earlier version")  # a run that stopped: its night never finished
    orphan = night_root / "certificates" / "LLC-2611-999_r1_certificate.pdf"
    orphan.parent.mkdir(parents=True, exist_ok=True)
    orphan.write_bytes(b"%PDF-1.7 signed by a run that stopped before its decision")
    nightly.run_stages(ws, store, signer, orchestrated=False)
    assert not orphan.exists()
    assert [e["file"] for e in _events(store, "document-removed")] == ["certificates/LLC-2611-999_r1_certificate.pdf"]
    assert documents_have_decisions(night_root, store.url) == []
