"""Sealed checkpoints outside the database: truncation and a re-chained history are found.

The attacks are an insider's who owns the database and the log file but not the checkpoint
folders: the last records of store and log deleted together (the chain stays intact, only
shorter), and a record edited with the whole chain recomputed after it (the chain, the rows and
the log all verify on their own). Also: the clock set back, an edited checkpoint file, and a
second checkpoint folder.
"""

from __future__ import annotations

import datetime as dt
import json

import pytest
from sqlalchemy import delete, insert, select, text, update

from flows.cli import build_parser
from pipeline.errors import StoreError
from pipeline.night.open import opened_signer
from pipeline.night.seal import seal
from pipeline.records import append_only, audit, checkpoints, ledger, row_hashes
from pipeline.records.demo_identity import create_demo_identity
from pipeline.records.tables import APPEND_ONLY_TABLES, AuditEvent, DecisionRow
from pipeline.records.workspace import open_workspace, write_settings
from tests.pg import database_of
from tests.records_fixture import filled_workspace, settings_of


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.slow)])
def url(request, tmp_path):
    yield from database_of(request.param, f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}")


@pytest.fixture(scope="module")
def signer(tmp_path_factory):
    """The demo plant's signing identity (a DEMO root CA and signer made for this test)."""
    keys = tmp_path_factory.mktemp("keys")
    demo = create_demo_identity(keys, "Tarnwick Bioprocess test plant", "Checkpoint tester")
    return opened_signer(demo.p12_path, demo.passphrase_path, None)


def sealed_workspace(tmp_path, url, signer=None, **records):
    """A filled workspace sealed by its own system identity (or by ``signer``, for a forgery)."""
    ws, store = filled_workspace(tmp_path / "ws", url)
    if records:
        write_settings(ws.root, settings_of(url, records=records))
        ws = open_workspace(ws.root)
    system = opened_signer(ws.keys / "signer.p12", ws.keys / "signer.passphrase", None)
    written = seal(ws, store, "test", signer or system)
    return ws, store, written


def verify(root, capsys) -> tuple[int, str]:
    args = build_parser().parse_args(["verify", "--workspace", str(root)])
    code = args.func(args)
    return code, capsys.readouterr().out


def _insider(store):
    connection = store.engine.connect()
    if store.is_postgresql:
        connection.execute(text("SET session_replication_role = replica"))
    else:
        append_only.drop_triggers(connection, APPEND_ONLY_TABLES)
    return connection


def test_a_checkpoint_is_signed_written_twice_and_verified(tmp_path, signer, capsys):
    url = f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}"
    ws, store, written = sealed_workspace(tmp_path, url, checkpoint_copy=str(tmp_path / "other-host"))
    head = store.last_event()
    name = f"{head.seq:06d}.json"
    assert written == [ws.root / "records" / "checkpoints" / name, tmp_path / "other-host" / name]
    sealed = json.loads(written[0].read_text())
    assert written[1].read_text() == written[0].read_text()
    assert (sealed["checkpoint"]["seq"], sealed["checkpoint"]["hash"]) == (head.seq, head.hash)
    check = checkpoints.check_signature(sealed)
    assert check.ok and "lotgate system" in check.signer and check.timestamp_utc is None
    code, out = verify(ws.root, capsys)
    assert code == 0, out
    assert f"VALID checkpoints: 2 found; latest {name}: record {head.seq}" in out  # the file in each folder

    # The signature covers the body: an edited checkpoint file is refused.
    sealed["checkpoint"]["seq"] = head.seq - 1
    written[1].write_text(json.dumps(sealed))
    code, out = verify(ws.root, capsys)
    assert code == 1 and "does not match its content" in out


def test_a_checkpoint_signed_by_anyone_but_the_system_identity_is_refused(tmp_path, signer, capsys):
    # The insider who rewrote the history writes a checkpoint of their own, signed with a self-made
    # certificate (its own CA): it does not chain to the plant's configured anchor.
    url = f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}"
    ws, store, _ = sealed_workspace(tmp_path, url, signer)
    code, out = verify(ws.root, capsys)
    assert code == 1 and "does not chain to the plant's configured trust anchor" in out, out
    # A person of the plant's own CA is not the system identity either.
    from pipeline.records.demo_trust import create_demo_trust

    p12, passphrase = create_demo_trust(ws.keys, "Tarnwick Bioprocess test plant").identity_of("mira.castellan")
    (ws.root / "records" / "checkpoints").joinpath(f"{store.last_event().seq:06d}.json").unlink()
    seal(ws, store, "test", opened_signer(p12, passphrase, None))
    code, out = verify(ws.root, capsys)
    assert code == 1 and "not signed by the installation's system identity" in out, out


def test_the_tail_cut_from_store_and_log_is_found(url, tmp_path, signer, capsys):
    ws, store, _ = sealed_workspace(tmp_path, url)
    last = store.last_event().seq
    with _insider(store) as c:
        c.execute(delete(AuditEvent.__table__).where(AuditEvent.seq > last - 3))
        c.commit()
    lines = ledger.read_lines(ws.log)
    ws.log.write_text("".join(line + "\n" for line in lines[:-3]))
    trail = audit.verify_trail(store, ws.log)
    assert trail.valid  # store and log agree, both chains intact: only the checkpoint knows
    code, out = verify(ws.root, capsys)
    assert code == 1
    assert f"attests record {last}" in out and f"the store ends at record {last - 3}" in out
    assert "records were removed from the end" in out


def test_a_re_chained_history_is_found(url, tmp_path, signer, capsys):
    ws, store, _ = sealed_workspace(tmp_path, url)
    decisions = DecisionRow.__table__
    with _insider(store) as c:
        row = dict(c.execute(select(decisions).order_by(decisions.c.id).limit(1)).mappings().one())
        row["decided_by"] = "Head of Quality"
        row["row_sha256"] = row_hashes.row_sha256(decisions, row)
        c.execute(update(decisions).where(decisions.c.id == row["id"])
                  .values(decided_by=row["decided_by"], row_sha256=row["row_sha256"]))
        bodies = [json.loads(b) for b in c.execute(select(AuditEvent.body).order_by(AuditEvent.seq)).scalars()]
        for body in bodies:  # the event naming the row gets the new hash ...
            for ref in body.get("rows", ()):
                if (ref["table"], ref["key"]) == ("decisions", str(row["id"])):
                    ref["row_sha256"] = row["row_sha256"]
        plain = [{k: v for k, v in b.items() if k not in ("seq", "prev_hash", "hash")} for b in bodies]
        rechained = ledger.chain(plain)  # ... and the whole chain is recomputed
        c.execute(delete(AuditEvent.__table__))
        c.execute(insert(AuditEvent.__table__), [
            {"seq": r["seq"], "time_utc": r["time_utc"], "kind": r["kind"], "lot_id": r.get("lot_id"),
             "body": ledger.canonical_json(r), "prev_hash": r["prev_hash"], "hash": r["hash"]} for r in rechained])
        c.commit()
    ws.log.write_text("".join(ledger.canonical_json(r) + "\n" for r in rechained))
    code, out = verify(ws.root, capsys)
    assert code == 1
    assert "VALID audit trail" in out and "VALID record rows" in out  # consistent in itself ...
    assert "the history before it was rewritten and re-chained" in out  # ... but not with the seal


def test_recording_with_the_clock_set_back_is_refused(tmp_path):
    url = f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}"
    ws, store = filled_workspace(tmp_path / "ws", url)
    now = dt.datetime.now(dt.UTC)
    nearly = {"kind": "test", "time_utc": (now + dt.timedelta(minutes=4)).isoformat(timespec="milliseconds")}
    store.add_events([nearly])  # the last record 4 minutes "ahead": clocks drift, within the default 5
    store.add_events([audit.event("decision", time_zone="UTC", lot_id="LLC-0003")])
    ahead = {"kind": "test", "time_utc": (now + dt.timedelta(hours=1)).isoformat(timespec="milliseconds")}
    store.add_events([ahead])  # written while the clock was an hour ahead; now it is "set back" an hour
    head = store.last_event().seq
    with pytest.raises(StoreError, match="the clock was set back; nothing was recorded") as refused:
        store.add_events([audit.event("decision", time_zone="UTC", lot_id="LLC-0003")])
    assert "\n" not in str(refused.value) and f"(audit event {head})" in str(refused.value)
    assert store.last_event().seq == head
    write_settings(ws.root, {"database_url": url, "records": {"clock_tolerance_minutes": 90}})
    from pipeline.night.open import open_records

    _, tolerant = open_records(ws.root)
    tolerant.add_events([audit.event("decision", time_zone="UTC", lot_id="LLC-0003")])  # a plant allowing 90 minutes
    assert tolerant.last_event().seq == head + 1
