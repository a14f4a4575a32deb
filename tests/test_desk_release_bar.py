"""The desk refuses a release the lot's results bar (an out-of-specification result without an
investigation outcome), showing the same one-line reason as ``lotgate decide``, and writes nothing.

The workspace is simulated in the store (tests/desk_fixtures.py: lot LLC-9000-106, lead 7.0 mg/kg
against LLC-200 3.1's lead ≤ 5.0 mg/kg, no investigation outcome); SQLite and PostgreSQL.
"""

import pytest

from flows.desk.roles import DeskRole
from pipeline.records import desk_accounts as accounts
from tests.desk_fixtures import OOS_LOT, PASSWORDS, make_workspace
from tests.test_desk_server import counts, csrf_of, signed_in


@pytest.fixture(scope="module")
def space(tmp_path_factory):
    return make_workspace(tmp_path_factory.mktemp("desk") / "ws")


def _workspace_files(space):
    """Every file of the workspace but the keys, with its SHA-256: what 'nothing written' compares."""
    import hashlib

    return {str(p.relative_to(space.root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(space.root.rglob("*")) if p.is_file() and "keys" not in p.parts}


def _a_barred_release_is_refused_and_writes_nothing(space):
    # The lot's lead result 7.0 mg/kg is out of specification (LLC-200 3.1: lead ≤ 5.0 mg/kg) and no
    # investigation outcome is recorded: the reviewer, with the right password, may not release it.
    from html import escape

    from pipeline.night.release_check import release_refusal

    store = space.desk.store
    reason = release_refusal(space.desk.ws, store, store.latest_decision(OOS_LOT))
    assert reason is not None and f"lot {OOS_LOT} cannot be released" in reason
    assert "Lead 7.0 mg/kg is out of specification (limit ≤ 5.0 mg/kg)" in reason
    assert f"lotgate investigate {OOS_LOT} --test lead" in reason and f"lotgate decide {OOS_LOT} --reject" in reason
    c = signed_in(space, DeskRole.REVIEWER)
    page = c.get("/lot", params={"id": OOS_LOT}).text
    assert 'id="release"' not in page and 'id="reject"' in page  # rejection stays possible
    assert escape(reason) in page and 'id="release-barred"' in page
    assert "Nothing was recorded" not in page  # said only when an act was refused
    form = c.get("/lot/sign", params={"id": OOS_LOT, "act": "release"}).text
    assert escape(reason) in form  # said before the password is typed
    before = counts(space), _workspace_files(space)
    user = accounts.user_by_login(store, "reviewer")
    account_events = accounts.account_kinds(store, user.id)
    response = c.post("/lot/sign", data={"csrf": csrf_of(form), "lot": OOS_LOT, "act": "release",
                                         "reason": "batch record reviewed, release wanted",
                                         "password": PASSWORDS[DeskRole.REVIEWER]})
    assert response.status_code == 400 and 'id="refusal"' in response.text and escape(reason) in response.text
    assert "Nothing was recorded." in response.text
    assert (counts(space), _workspace_files(space)) == before  # no record, no event, no certificate
    assert accounts.account_kinds(store, user.id) == account_events  # no desk signature either
    assert store.latest_decision(OOS_LOT).revision == 1


def test_a_release_barred_by_an_oos_result_is_refused_at_the_desk_with_its_reason(space):
    _a_barred_release_is_refused_and_writes_nothing(space)


@pytest.mark.postgres
def test_a_release_barred_by_an_oos_result_is_refused_at_the_desk_on_postgresql(tmp_path):
    from tests.pg import fresh_database

    url, drop = fresh_database()
    try:
        space = make_workspace(tmp_path / "ws", database_url=url)
        _a_barred_release_is_refused_and_writes_nothing(space)
        space.desk.store.engine.dispose()
    finally:
        drop()
