"""Retries where they belong: a transient store failure in an I/O task is retried by Prefect and the night
reaches the records of an uninterrupted night; a failure in the computation is not retried.

The reference is the same night's exports run without orchestration and without any failure, in
a second workspace (simulated data with known truth: the demo plant's first night, which carries
no deliberate problem).
"""

from __future__ import annotations

from collections import Counter

import pytest
from sqlalchemy.exc import OperationalError

from pipeline.demo import plant as demo
from pipeline.errors import StoreError
from pipeline.records import audit
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, write_settings

pytestmark = pytest.mark.slow


def _workspace(root, night):
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir(parents=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir()
    for name, data in night.files.items():
        atomic_write(root / "inbox" / name, data)


def _dropped_connection() -> StoreError:
    cause = OperationalError("INSERT INTO decisions ...", {}, Exception("server closed the connection unexpectedly"))
    try:
        raise StoreError("the results store refused a write: OperationalError") from cause
    except StoreError as exc:
        return exc


@pytest.fixture(scope="module")
def night():
    return demo.build_scenario(nights=2, lipase_per_night=3, protease_per_night=2)[0]


def test_a_dropped_connection_while_publishing_is_retried_and_the_night_completes(tmp_path, monkeypatch, night,
                                                                                  prefect_harness):
    from flows import nightly
    from pipeline.night.open import open_night

    reference = tmp_path / "reference"
    _workspace(reference, night)
    ws, store, signer = open_night(reference)
    nightly.run_stages(ws, store, signer, orchestrated=False)
    expected = {d.lot_id: (d.disposition, d.record.label) for d in store.decisions()}
    assert len(expected) == 5

    root = tmp_path / "retried"
    _workspace(root, night)
    real = Store.add_decisions
    calls = []

    def second_commit_drops_the_connection(self, writes, limits=()):
        calls.append([w.record.lot_id for w in writes])
        if len(calls) == 2:  # the first lot is committed; the connection drops before the second's commit
            raise _dropped_connection()
        return real(self, writes, limits)

    monkeypatch.setattr(Store, "add_decisions", second_commit_drops_the_connection)
    monkeypatch.setattr(nightly, "publish", nightly.publish.with_options(retry_delay_seconds=0))
    summary = nightly.nightly(str(root))

    assert calls[1] == calls[2]  # Prefect ran the publishing task again: the failed lot was committed then
    assert len(calls) == 1 + len(expected)  # and the lot committed before the failure was not stored again
    stored = Store(f"sqlite:///{root / 'lotgate.db'}")
    rows = stored.decisions()
    assert Counter(d.lot_id for d in rows).most_common(1)[0][1] == 1
    assert {d.lot_id: (d.disposition, d.record.label) for d in rows} == expected
    assert all(o.new for o in summary.outcomes) and summary.archived == len(night.files)
    assert len({d.record.night_id for d in rows}) == 1  # one night, not an interrupted one and a second
    for d in rows:
        assert (root / "reports" / d.record.report.file).is_file()
        if d.record.certificate is not None:
            assert (root / "certificates" / d.record.certificate.file).is_file()
    assert not [p for p in (root / ".staging").rglob("*") if p.is_file()]
    check = audit.verify_trail(stored, root / "decisions.jsonl")
    assert check.valid, check.reason


def test_a_failure_in_the_computation_is_not_retried(tmp_path, monkeypatch, night, prefect_harness):
    from flows import nightly

    root = tmp_path / "computation"
    _workspace(root, night)
    calls = []

    def failing_evaluation(*args, **kwargs):
        calls.append(1)
        raise _dropped_connection()  # even a failure that looks transient: computation is never retried

    monkeypatch.setattr(nightly, "evaluate", nightly.evaluate.with_options(name="compute results"))
    monkeypatch.setattr(nightly.evaluate, "fn", failing_evaluation)
    with pytest.raises(StoreError):
        nightly.nightly(str(root))
    assert calls == [1]
    store = Store(f"sqlite:///{root / 'lotgate.db'}")
    assert not store.decisions() and store.unfinished_nights(_identity(root))  # failed, left for recovery
    kinds = [e.body for e in store.audit_events()]
    assert any('"night-failed"' in body for body in kinds)


def _identity(root):
    from pipeline.records.workspace_id import workspace_id

    return workspace_id(root)
