"""Records nobody rewrites unseen: a row inserted, edited or deleted in any record table is found.

An insider who owns the database (drops the triggers on SQLite; on PostgreSQL turns triggers and
foreign keys off for the session with ``session_replication_role = replica``, as a superuser may)
changes one record table; ``lotgate verify --workspace`` must exit 1 and name the table, the key
and what happened. The forged rows carry a correctly computed row_sha256: knowing the algorithm
does not help, because the chained audit event of the transaction that wrote each row names it
with its hash. Also: the triggers refuse UPDATE and DELETE on every record table.
"""

from __future__ import annotations

import re

import pytest
from sqlalchemy import delete, func, insert, select, text, update
from sqlalchemy.exc import DBAPIError

from flows.cli import build_parser
from pipeline.records import append_only, row_hashes
from pipeline.records.tables import APPEND_ONLY_TABLES, RECORD_TABLES
from tests.pg import database_of
from tests.records_fixture import filled_workspace

TABLES = {model.__tablename__: model for model in RECORD_TABLES}
EDITS = {  # one column per table an insider would want to change, and the forged value
    "night_runs": ("code_version", "forged"), "input_files": ("file_name", "other.csv"),
    "lots": ("product_code", "PGR-040"), "decisions": ("decided_by", "Head of Quality"),
    "results": ("value", 1.0), "control_limits": ("sigma", 1.85), "chart_points": ("value", 999.0),
    "night_closings": ("lots_decided", 99), "lims_exports": ("export_name", "forged"),
    "lot_results": ("value", 0.1), "investigations": ("outcome", "forged"), "document_status": ("status", "current"),
    "desk_users": ("role", "administrator"), "desk_account_events": ("kind", "login"),
    "desk_credentials": ("password_hash", "a hash the insider knows the password of"),
}
UNIQUE = {  # what an inserted copy must change to satisfy the table's unique constraints
    "lots": {"lot_id": "LLC-9999"}, "decisions": {"fingerprint": "forged", "revision": 99},
    "control_limits": {"version": 99}, "chart_points": {"lot_id": "LLC-9999"}, "desk_users": {"login": "forged"},
}


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.slow)])  # ~3 s each: a database made
def url(request, tmp_path):
    yield from database_of(request.param, f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}")


def verify(root, capsys, *extra) -> tuple[int, str]:
    args = build_parser().parse_args(["verify", "--workspace", str(root), *extra])
    code = args.func(args)
    return code, capsys.readouterr().out


def insider(store):
    """A connection of someone who owns the database and silences its guards."""
    connection = store.engine.connect()
    if store.is_postgresql:
        connection.execute(text("SET session_replication_role = replica"))  # no triggers, no foreign keys
    else:
        append_only.drop_triggers(connection, APPEND_ONLY_TABLES)  # not put back: verify must say so too
    return connection


def test_an_untouched_workspace_verifies(url, tmp_path, capsys):
    ws, store = filled_workspace(tmp_path / "ws", url)
    code, out = verify(ws.root, capsys)
    assert code == 0, out
    # every record table holds rows (checked below), each named by its transaction's audit event
    assert re.search(r"VALID record rows: \d+ rows in 15 tables", out) and "INVALID" not in out
    with store.engine.connect() as c:
        for model in RECORD_TABLES:  # every table holds rows, so every table's tampering can be tried
            assert c.execute(select(func.count()).select_from(model.__table__)).scalar() >= 1, model.__tablename__


@pytest.mark.parametrize("table", sorted(TABLES))
@pytest.mark.parametrize("attack", ["insert", "edit", "delete"])
def test_a_row_changed_outside_lotgate_is_named(url, tmp_path, capsys, table, attack):
    ws, store = filled_workspace(tmp_path / "ws", url)
    model = TABLES[table]
    t = model.__table__
    key = row_hashes.primary_key(t)
    with insider(store) as c:
        row = dict(c.execute(select(t).order_by(t.c[key]).limit(1)).mappings().one())
        if attack == "edit":
            column, value = EDITS[table]
            assert row[column] != value
            c.execute(update(t).where(t.c[key] == row[key]).values({column: value}))
        elif attack == "delete":
            c.execute(delete(t).where(t.c[key] == row[key]))
        else:
            forged = {k: v for k, v in row.items() if k != key or table == "lots"}
            forged.update(UNIQUE.get(table, {}))
            if table == "night_closings":
                forged["night_id"] = 2  # the night that never closed "closes"
            if table == "lims_exports":
                forged["decision_id"] = c.execute(select(func.max(TABLES["decisions"].id))).scalar()
            forged["row_sha256"] = row_hashes.row_sha256(t, forged)  # the insider knows the algorithm
            c.execute(insert(t).values(forged))
        c.commit()
    code, out = verify(ws.root, capsys)
    assert code == 1, out
    assert "INVALID record rows:" in out and f"{table} row " in out
    phrase = {"insert": "no audit event recorded this row", "edit": "edited after it was written",
              "delete": "it was deleted"}[attack]
    assert phrase in out, out
    if not store.is_postgresql:
        assert "missing on" in out  # the dropped triggers are reported as well


@pytest.mark.parametrize("table", APPEND_ONLY_TABLES)
def test_the_database_refuses_update_and_delete_on_every_record_table(url, tmp_path, table):
    ws, store = filled_workspace(tmp_path / "ws", url)
    t = TABLES[table].__table__ if table in TABLES else None
    with store.engine.connect() as c:
        if t is None:  # the audit chain itself
            statements = [text("UPDATE audit_events SET kind = 'x'"), text("DELETE FROM audit_events")]
        else:
            column = EDITS[table][0]
            statements = [update(t).values({column: EDITS[table][1]}), delete(t)]
        for statement in statements:
            with pytest.raises(DBAPIError, match=f"{table} is append-only"):
                c.execute(statement)
            c.rollback()


def test_a_persons_signature_that_does_not_match_its_record_is_named(tmp_path, capsys):
    import dataclasses

    from pipeline.records import audit, ledger
    from pipeline.records.demo_identity import create_demo_identity
    from pipeline.records.signing import load_identity, sign_record
    from pipeline.records.stored import DecisionWrite

    ws, store = filled_workspace(tmp_path / "ws", f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}")
    keys = create_demo_identity(tmp_path / "keys", "Tarnwick Bioprocess test plant", "Ines Haldor")
    person = load_identity(keys.p12_path, passphrase_env="", passphrase_file=keys.passphrase_path)
    latest = store.latest_decision("LLC-0002").record
    signed = dataclasses.replace(latest, revision=latest.revision + 1, fingerprint="person-1", disposition="rejected")
    good = sign_record(person, ledger.canonical_json(signed.to_json()).encode()).to_dict()
    # A second record carrying the first one's signature: a signature copied onto another decision.
    copied = dataclasses.replace(signed, revision=latest.revision + 2, fingerprint="person-2", disposition="released")
    store.add_decisions([DecisionWrite(dataclasses.replace(signed, person_signature=good), "Ines Haldor (DEMO)",
                                       events=(audit.event("person-disposition", time_zone="UTC"),)),
                         DecisionWrite(dataclasses.replace(copied, person_signature=good), "Ines Haldor (DEMO)",
                                       events=(audit.event("person-disposition", time_zone="UTC"),))])
    audit.sync_log(store, ws.log)
    code, out = verify(ws.root, capsys)
    assert code == 1
    assert "INVALID person's signatures: 2 decisions signed by a person, 1 not valid:" in out
    assert (f"lot LLC-0002 revision {latest.revision + 2}: the signature of Ines Haldor (DEMO) does not match the "
            "record") in out
