"""A migration stopped part-way leaves a SQLite store as it was, so the next open migrates it whole.

Found by the kill test (tests/test_crash.py): a night killed while a new store was being created
left the first migration's tables without a version, and every later run stopped with "table
night_runs already exists".
"""

import alembic.op
import pytest
from alembic.config import Config
from alembic.script import ScriptDirectory
from sqlalchemy import inspect, text

from pipeline.records import database
from pipeline.records.store import Store


def _head() -> str:
    config = Config()
    config.set_main_option("script_location", str(database.MIGRATIONS))
    return ScriptDirectory.from_config(config).get_current_head()


def test_a_migration_stopped_part_way_leaves_nothing_and_the_next_open_completes_it(tmp_path, monkeypatch):
    url = f"sqlite:///{tmp_path / 'lotgate.db'}"
    real = alembic.op.create_index

    def stop_at_the_lot_record(name, table, *args, **kwargs):
        if table == "lot_results":
            raise KeyboardInterrupt("stopped during the migration")  # as a kill would, mid-way
        return real(name, table, *args, **kwargs)

    monkeypatch.setattr(alembic.op, "create_index", stop_at_the_lot_record)
    with pytest.raises(KeyboardInterrupt):
        database.migrate(database.open_engine(url))
    assert inspect(database.open_engine(url)).get_table_names() == []
    monkeypatch.undo()
    store = Store(url)
    with store.engine.connect() as connection:
        assert connection.execute(text("select version_num from alembic_version")).scalar() == _head()
    assert {"night_runs", "lot_results", "audit_events"} <= set(inspect(store.engine).get_table_names())
