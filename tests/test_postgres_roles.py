"""PostgreSQL role split: the owner runs the migrations, the nights run as a role that cannot change records.

The roles are made by ``append_only.role_split_statements`` in a throw-away database; a small
demo-plant night runs as the application role; then an UPDATE and a DELETE of a decision are
refused by the grants (application role) and by the triggers (owner, who holds every grant).
"""

from __future__ import annotations

import datetime as dt
import uuid

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.exc import DBAPIError

from flows import nightly
from pipeline.demo import plant as demo
from pipeline.night.open import opened_signer
from pipeline.records import append_only
from pipeline.records.demo_identity import create_demo_identity
from pipeline.records.store import Store
from pipeline.records.workspace import open_workspace, write_settings
from tests.pg import ADMIN_URL, fresh_database

pytestmark = pytest.mark.slow  # a database, two roles and a night: ~10 s


@pytest.fixture
def split(tmp_path):
    url, drop = fresh_database()
    database = url.rsplit("/", 1)[1]
    tag = uuid.uuid4().hex[:8]
    owner, app = f"lotgate_owner_{tag}", f"lotgate_app_{tag}"
    admin = create_engine(url, isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        for statement in append_only.role_split_statements(owner, app, database):
            c.execute(text(statement))
    admin.dispose()
    base = url.rsplit("@", 1)[1]
    yield f"postgresql+psycopg://{owner}@{base}", f"postgresql+psycopg://{app}@{base}"
    drop()
    cluster = create_engine(ADMIN_URL, isolation_level="AUTOCOMMIT")
    with cluster.connect() as c:
        c.execute(text(f"DROP ROLE IF EXISTS {app}"))
        c.execute(text(f"DROP ROLE IF EXISTS {owner}"))
    cluster.dispose()


def test_a_night_runs_as_the_application_role_which_cannot_change_records(split, tmp_path):
    owner_url, app_url = split
    Store(owner_url).engine.dispose()  # the owner's first open runs every migration
    root = tmp_path / "ws"
    (root / "inbox").mkdir(parents=True)
    night = demo.build_scenario(first_night=dt.date(2026, 10, 5), nights=1, lipase_per_night=1, protease_per_night=1)[0]
    for name, data in night.files.items():
        (root / "inbox" / name).write_bytes(data)
    write_settings(root, {"database_url": app_url, "time_zone": "UTC"})
    ws = open_workspace(root)
    ws.make_folders()
    keys = create_demo_identity(tmp_path / "keys", "Tarnwick Bioprocess test plant", "Role tester")
    store = Store(app_url)
    summary = nightly.run_stages(ws, store, opened_signer(keys.p12_path, keys.passphrase_path, None),
                                 orchestrated=False)
    assert summary.received == summary.archived + summary.quarantined
    assert len(store.decisions()) == 2  # the night stored its decisions as the application role
    store.engine.dispose()

    app = create_engine(app_url)
    with app.connect() as c:
        for statement in ("UPDATE decisions SET decided_by = 'Head of Quality'", "DELETE FROM results",
                          "TRUNCATE audit_events"):
            with pytest.raises(DBAPIError, match="permission denied"):
                c.execute(text(statement))
            c.rollback()
    app.dispose()
    owner = create_engine(owner_url)
    with owner.connect() as c:
        for statement in ("UPDATE decisions SET decided_by = 'Head of Quality'", "DELETE FROM results"):
            with pytest.raises(DBAPIError, match="is append-only"):
                c.execute(text(statement))
            c.rollback()
    owner.dispose()
