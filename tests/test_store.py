"""The results store on SQLite and on PostgreSQL: migrations, revisions, audit trail, tampering."""

import json

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.exc import DBAPIError

from pipeline.errors import InputError, StoreError
from pipeline.records import append_only, audit, ledger
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite
from pipeline.records.tables import APPEND_ONLY_TABLES
from pipeline.release.records import DecisionRecord, RecordedResult
from tests.pg import database_of


@pytest.fixture(params=["sqlite", "postgresql"])
def url(request, tmp_path):
    yield from database_of(request.param, f"sqlite:///{tmp_path / 'store.db'}")


def _decision(lot, fingerprint, disposition="released"):
    return DecisionRecord(lot, "LLC-200", disposition, (), (), "1.0", "a" * 64, fingerprint, disposition,
                          input_files={"lots-1.csv": "b" * 64},
                          results=(RecordedResult("activity", 1200.0, "1200", "U/mL", "pass"),))


def test_migrations_bring_a_new_database_to_the_current_version(url):
    store = Store(url)
    with store.engine.connect() as connection:
        version = connection.execute(text("select version_num from alembic_version")).scalar()
        tables = set(store.engine.dialect.get_table_names(connection))
    assert version == "0008_desk_credentials"
    assert {"input_files", "lots", "decisions", "results", "control_limits", "audit_events", "night_runs",
            "lot_results", "investigations", "document_status", "desk_users", "desk_account_events",
            "desk_credentials"} <= tables


def _database_at(url, revision):
    """An engine on a database brought to ``revision`` only, for filling with that version's data."""
    from alembic import command
    from alembic.config import Config

    from pipeline.records.database import MIGRATIONS
    engine = create_engine(url)
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, revision)
    return engine


def test_a_0002_database_upgrades_with_its_nights_and_the_first_workspace_adopts_it(url):
    engine = _database_at(url, "0002")
    with engine.begin() as connection:
        connection.execute(text("insert into night_runs (started_at_utc, finished_at_utc, code_version, files_received,"
                                " files_archived, files_quarantined, lots_decided) values (CURRENT_TIMESTAMP, NULL,"
                                " '0.1.0', 3, 2, 1, 1)"))
    engine.dispose()
    store = Store(url)
    with store.engine.connect() as connection:
        assert connection.execute(text("select workspace_id from night_runs")).all() == [(None,)]
        assert connection.execute(text("select count(*) from night_closings")).scalar() == 0  # it never finished
    # The night stored before identities is this workspace's to recover; then the store is the workspace's.
    assert [n.id for n in store.unfinished_nights("a" * 32)] == [1]
    store.start_night("test", "a" * 32)
    with pytest.raises(StoreError, match="holds the nights of another workspace .*store_shared: true"):
        store.start_night("test", "b" * 32)
    with pytest.raises(StoreError, match="another workspace"):
        store.check_workspace("b" * 32)
    assert store.unfinished_nights("b" * 32) == [store.unfinished_nights("a" * 32)[0]]  # only the one of before
    store.start_night("test", "b" * 32, shared=True)  # a store the plant declares shared takes both
    assert {n.id for n in store.unfinished_nights("b" * 32)} == {1, 3}


def test_a_database_of_the_previous_version_upgrades_with_its_data(url):
    # Build the schema of revision 0001 (the first release of the store), fill it, then open it.
    engine = _database_at(url, "0001")
    with engine.begin() as connection:
        connection.execute(text("insert into lots (lot_id, product_code, first_seen_utc) values "
                                "('LLC-0001', 'LLC-200', CURRENT_TIMESTAMP)"))
    engine.dispose()
    store = Store(url)
    with store.engine.connect() as connection:
        assert connection.execute(text("select count(*) from lots")).scalar() == 1
        assert connection.execute(text("select count(*) from lims_exports")).scalar() == 0
        # the row stored before row hashes is hashed and named by one chained event (migration 0004)
        [body] = connection.execute(text("select body from audit_events")).scalars().all()
    assert json.loads(body)["rows"] == [{"table": "lots", "key": "LLC-0001",
                                         "row_sha256": json.loads(body)["rows"][0]["row_sha256"]}]
    assert audit.verify_store(store).valid


def test_a_0007_database_upgrades_with_its_desk_accounts_and_their_passwords_stay_in_force(url):
    # Migration 0008 adds desk_credentials: an account made before keeps its own password and key
    # (credentials version 0) until its first change, which is a new row the database never lets change.
    from pipeline.records import desk_accounts as accounts

    engine = _database_at(url, "0007_more_record_tables")
    with engine.begin() as connection:
        connection.execute(text("insert into desk_users (login, printed_name, role, password_hash, key_file, "
                                "key_sha256, signer_certificate_sha256, created_at_utc, created_by) values ('ines', "
                                "'Ines Varga', 'reviewer', 'first-hash', 'keys/desk/ines.p12', 'k', 'c', "
                                "CURRENT_TIMESTAMP, 'admin')"))
    engine.dispose()
    store = Store(url)
    user = accounts.user_by_login(store, "ines")
    assert (user.password_hash, user.key_file, user.credentials_version) == ("first-hash", "keys/desk/ines.p12", 0)
    accounts.set_credentials(store, user.id, 0, accounts.NewCredentials("changed", "second-hash", None, None, None,
                                                                        "ines"), "password-changed", None, [])
    user = accounts.user_by_login(store, "ines")
    assert (user.password_hash, user.key_file, user.credentials_version) == ("second-hash", None, 1)
    with pytest.raises(InputError, match="changed meanwhile"):  # a change read at version 0 no longer holds
        accounts.set_credentials(store, user.id, 0, accounts.NewCredentials("changed", "third-hash", None, None,
                                                                            None, "ines"), "password-changed", None, [])
    with store.engine.connect() as connection, pytest.raises(DBAPIError, match="desk_credentials is append-only"):
        connection.execute(text("update desk_credentials set password_hash = 'forged'"))


def test_revisions_supersede_and_stay_readable(url):
    store = Store(url)
    [first] = store.add_decisions([DecisionWrite(_decision("LLC-0001", "f1", "held"), "lotgate",
                                                 manufactured_on="2026-11-25")])
    [second] = store.add_decisions([DecisionWrite(_decision("LLC-0001", "f2"), "lotgate",
                                                  manufactured_on="2026-11-25", change_note="re-assay")])
    rows = store.decisions("LLC-0001")
    assert [r.revision for r in rows] == [1, 2]
    # the record comes back as it was written, as the same type
    assert rows[1].record == _decision("LLC-0001", "f2") and rows[1].change_note == "re-assay"
    assert rows[0].superseded_by == second.id and rows[0].disposition == "held"
    assert store.latest_decision("LLC-0001").id == second.id and first.id != second.id


def _trail(url, tmp_path, n=6):
    store = Store(url)
    log = tmp_path / "decisions.jsonl"
    for i in range(n):
        store.add_events([audit.event("decision", time_zone="Europe/Berlin", lot_id=f"L-{i:03d}", n=i)])
        audit.sync_log(store, log)
    return store, log


def test_store_and_log_agree(url, tmp_path):
    store, log = _trail(url, tmp_path)
    check = audit.verify_trail(store, log)
    assert check.valid and check.store_records == check.log_records == 6


@pytest.mark.parametrize("tamper", ["edit", "delete", "reorder"])
def test_tampering_in_the_store_is_found_and_the_record_named(url, tmp_path, tamper):
    store, log = _trail(url, tmp_path)
    with store.engine.begin() as connection:
        append_only.drop_triggers(connection, APPEND_ONLY_TABLES)  # an insider who owns the database
        if tamper == "edit":
            body = json.loads(connection.execute(text("select body from audit_events where seq = 3")).scalar())
            body["n"] = 99
            connection.execute(text("update audit_events set body = :b where seq = 3"),
                               {"b": ledger.canonical_json(body)})
        elif tamper == "delete":
            connection.execute(text("delete from audit_events where seq = 3"))
        else:
            a, b = (connection.execute(text("select body from audit_events where seq = :s"), {"s": s}).scalar()
                    for s in (3, 4))
            connection.execute(text("update audit_events set body = :b where seq = 3"), {"b": b})
            connection.execute(text("update audit_events set body = :b where seq = 4"), {"b": a})
    check = audit.verify_trail(store, log)
    assert not check.valid
    assert "in the store" in check.reason
    assert "record 3" in check.reason or "record 4" in check.reason


@pytest.mark.parametrize("tamper", ["edit", "delete", "reorder"])
def test_tampering_in_the_log_is_found_and_the_record_named(url, tmp_path, tamper):
    store, log = _trail(url, tmp_path)
    lines = log.read_text().splitlines()
    if tamper == "edit":
        record = json.loads(lines[2])
        record["n"] = 99
        lines[2] = json.dumps(record)
    elif tamper == "delete":
        del lines[2]
    else:
        lines[2], lines[3] = lines[3], lines[2]
    log.write_text("\n".join(lines) + "\n")
    check = audit.verify_trail(store, log)
    assert not check.valid and "in the log file" in check.reason
    assert "record 3" in check.reason or "record 4" in check.reason


def test_a_crash_between_store_and_log_is_mended_on_the_next_write(url, tmp_path):
    store, log = _trail(url, tmp_path, n=3)
    store.add_events([audit.event("decision", time_zone="UTC", lot_id="L-X")])  # the log file missed it
    assert not audit.verify_trail(store, log).valid
    with open(log, "a") as handle:
        handle.write('{"half a line')  # and a partial line, as a kill during a write leaves
    assert audit.sync_log(store, log) == 1
    assert audit.verify_trail(store, log).valid


def _write(lot, fingerprint, *, chart_value=None, events=True):
    return DecisionWrite(
        _decision(lot, fingerprint), "lotgate", manufactured_on="2026-11-25", standard_errors={"activity": 12.0},
        chart_values={} if chart_value is None else {"activity": chart_value},
        events=(audit.event("decision", time_zone="Europe/Berlin", lot_id=lot, fingerprint=fingerprint),)
        if events else ())


def test_a_batch_of_decisions_is_stored_in_order_with_revisions_and_one_chain(url, tmp_path):
    # The night stores a window of lots in one transaction; it must equal storing them one by one.
    store = Store(url)
    store.add_decisions([_write("LLC-0001", "f1")])
    rows = store.add_decisions([_write("LLC-0002", "f2", chart_value=1190.0), _write("LLC-0001", "f3"),
                                _write("LLC-0003", "f4"), _write("LLC-0003", "f5")])
    assert [(r.lot_id, r.revision) for r in rows] == [("LLC-0002", 1), ("LLC-0001", 2), ("LLC-0003", 1),
                                                      ("LLC-0003", 2)]
    by_lot = {lot: store.decisions(lot) for lot in ("LLC-0001", "LLC-0003")}
    assert by_lot["LLC-0001"][0].superseded_by == by_lot["LLC-0001"][1].id
    assert by_lot["LLC-0003"][0].superseded_by == by_lot["LLC-0003"][1].id
    assert by_lot["LLC-0003"][1].superseded_by is None
    assert [p.lot_id for p in store.released_points("LLC-200", "activity")] == ["LLC-0002"]
    with store.engine.connect() as connection:
        results = connection.execute(text("select count(*) from results")).scalar()
        bodies = [json.loads(b) for b in connection.execute(text("select body from audit_events order by seq"))
                  .scalars()]
    bodies = [b for b in bodies if b["kind"] == "decision"]  # each transaction also names its rows (records-written)
    assert results == 5
    assert [(b["lot_id"], b["fingerprint"], b["revision"]) for b in bodies] == [
        ("LLC-0001", "f1", 1), ("LLC-0002", "f2", 1), ("LLC-0001", "f3", 2), ("LLC-0003", "f4", 1),
        ("LLC-0003", "f5", 2)]
    log = tmp_path / "decisions.jsonl"
    audit.sync_log(store, log)
    assert audit.verify_trail(store, log).valid


def test_a_batch_that_fails_in_the_database_stores_nothing(url):
    from pipeline.errors import StoreError

    store = Store(url)
    store.add_decisions([_write("LLC-0001", "f1", chart_value=1200.0)])
    # The second write repeats LLC-0001's chart point (unique per product, attribute and lot).
    with pytest.raises(StoreError):
        store.add_decisions([_write("LLC-0002", "f2"), _write("LLC-0001", "f3", chart_value=1210.0)])
    assert [(r.lot_id, r.revision) for r in store.decisions()] == [("LLC-0001", 1)]
    with store.engine.connect() as connection:
        assert connection.execute(text("select count(*) from audit_events")).scalar() == 2  # its decision event and its records-written event
        assert connection.execute(text("select count(*) from lots")).scalar() == 1


def test_the_log_is_brought_up_to_date_page_by_page(url, tmp_path, monkeypatch):
    store = Store(url)
    log = tmp_path / "decisions.jsonl"
    store.add_events([audit.event("decision", time_zone="Europe/Berlin", lot_id=f"L-{i:03d}", n=i) for i in range(7)])
    monkeypatch.setattr(audit, "SYNC_PAGE_EVENTS", 2)
    assert audit.sync_log(store, log) == 7
    assert [json.loads(line)["n"] for line in log.read_text().splitlines()] == list(range(7))
    assert audit.sync_log(store, log) == 0
    check = audit.verify_trail(store, log)
    assert check.valid and check.store_records == check.log_records == 7


def test_orm_rows_never_leave_the_store():
    # Ports and adapters (common practice): only the store's own modules name its tables or
    # SQLAlchemy; audit, chart queries, the night's use cases and the commands get records.
    import ast
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    own = {"pipeline/records/store.py", "pipeline/records/stored.py", "pipeline/records/tables.py",
           "pipeline/records/database.py", "pipeline/records/lot_record_store.py",
           # the desk's store queries: frozen records out, like store.py (kept apart to keep store.py small)
           "pipeline/records/desk_accounts.py", "pipeline/records/desk_queries.py",
           "pipeline/records/status_queries.py",  # the store's read-only status view (no migration), frozen records out
           "pipeline/records/row_hashes.py", "pipeline/records/append_only.py", "pipeline/records/store_check.py",
           "pipeline/records/current.py"}
    offenders = []
    for path in [*root.joinpath("pipeline").rglob("*.py"), *root.joinpath("flows").rglob("*.py")]:
        name = str(path.relative_to(root))
        if name in own or name.startswith("pipeline/records/migrations/"):
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            modules = ([a.name for a in node.names] if isinstance(node, ast.Import)
                       else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            offenders += [f"{name}: {m}" for m in modules if m.startswith(("sqlalchemy", "pipeline.records.tables"))]
    assert offenders == []
