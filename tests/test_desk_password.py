"""A desk password changed by its person, and reset by the administrator (``lotgate users reset-password``).

21 CFR Part 11 §11.300(b) asks that passwords be periodically checked and revised (from memory);
a lab's procedures let a person change their own and an administrator force a new one. Each test
works on its own small workspace simulated in the store (tests/desk_fixtures.py) through
Starlette's test client (no server); the command line runs as a child process (tests/cli.py).
"""

import os
import re
import shutil
import stat
import warnings

import pytest
from sqlalchemy import select

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from starlette.testclient import TestClient

from flows.desk import passwords
from flows.desk.accounts import Desk
from flows.desk.app import create_app
from flows.desk.roles import DeskRole
from flows.desk.settings import DeskSettings
from pipeline.errors import InputError
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts
from pipeline.records.desk_queries import trail_events, trail_length
from pipeline.records.store import Store
from pipeline.records.tables import DeskCredentials, DeskUser
from pipeline.records.workspace import open_workspace
from tests.cli import run_cli
from tests.desk_fixtures import PASSWORDS, DeskWorkspace, make_workspace

OLD = PASSWORDS[DeskRole.REVIEWER]
NEW = "a new reviewer passphrase 2027"


@pytest.fixture(scope="module")
def pristine(tmp_path_factory):
    made = make_workspace(tmp_path_factory.mktemp("desk-password") / "ws")
    made.desk.store.engine.dispose()
    return made.root


@pytest.fixture
def space(pristine, tmp_path):
    """A copy of one simulated workspace per test (each test changes its accounts)."""
    root = tmp_path / "ws"
    shutil.copytree(pristine, root, symlinks=True)
    ws = open_workspace(root)
    return DeskWorkspace(root, Desk(ws, Store(ws.database_url), DeskSettings()))


def client(space):
    return TestClient(create_app(space.desk), base_url="https://testserver")


def csrf_of(html):
    return re.search(r'name="csrf" value="([^"]+)"', html).group(1)


def login(c, name, password):
    token = csrf_of(c.get("/login").text)
    return c.post("/login", data={"csrf": token, "name": name, "password": password}, follow_redirects=False)


def signed_in(space, name="reviewer", password=OLD):
    c = client(space)
    assert login(c, name, password).status_code == 303
    return c


def change(c, current, new, repeat=None, csrf=True):
    data = {"current": current, "new": new, "repeat": new if repeat is None else repeat}
    if csrf:
        data["csrf"] = csrf_of(c.get("/password").text)
    return c.post("/password", data=data)


def reject(c, lot, password):
    """A signature at the desk: the person's sealed key opened by the password typed (lotgate decide's use case)."""
    return c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": lot, "act": "reject",
                                     "reason": "re-assay confirms the trend", "password": password})


def reviewer(space):
    return accounts.user_by_login(space.desk.store, "reviewer")


def kinds_since(space, seq):
    events = trail_events(space.desk.store, limit=trail_length(space.desk.store) - seq)
    return [e.kind for e in reversed(events) if e.kind != "records-written"]


def key_files(space):
    return sorted(p.name for p in (space.root / "keys" / "desk").iterdir() if p.name.startswith("reviewer"))


def test_a_changed_password_signs_in_and_signs_and_the_old_one_does_neither(space):
    c = signed_in(space)
    before = trail_length(space.desk.store)
    response = change(c, OLD, NEW)
    assert response.status_code == 200 and 'id="changed"' in response.text and "signing key" in response.text
    assert kinds_since(space, before) == ["desk-password-changed"]
    user = reviewer(space)
    assert user.credentials_version == 1 and user.key_file == "keys/desk/reviewer+1.p12"
    assert key_files(space) == ["reviewer+1.p12"]  # the former sealed file is gone once the new one is recorded
    assert stat.S_IMODE((space.root / user.key_file).stat().st_mode) == 0o600
    assert login(client(space), "reviewer", OLD).status_code == 401
    fresh = signed_in(space, password=NEW)
    assert reject(fresh, "LLC-9000-101", OLD).status_code == 403  # the old password opens nothing any more
    signed = reject(fresh, "LLC-9000-101", NEW)
    assert signed.status_code == 200 and "Ines Varga (DEMO)" in signed.text
    latest = space.desk.store.latest_decision("LLC-9000-101")
    assert latest.disposition == "rejected" and latest.record.person_signature
    # the session that changed the password goes on (with a new cookie)
    assert c.get("/", follow_redirects=False).status_code == 200
    assert audit.verify_trail(space.desk.store, space.desk.ws.log).valid


def test_every_other_session_of_the_person_ends_and_others_people_stay(space):
    here, there = signed_in(space), signed_in(space)
    viewer = signed_in(space, "viewer", PASSWORDS[DeskRole.VIEWER])
    assert change(here, OLD, NEW).status_code == 200
    assert there.get("/", follow_redirects=False).headers["location"] == "/login"
    assert here.get("/", follow_redirects=False).status_code == 200
    assert viewer.get("/", follow_redirects=False).status_code == 200


def test_a_wrong_current_password_is_refused_and_counted_like_a_failed_sign_in(space):
    c = signed_in(space)
    before = trail_length(space.desk.store)
    response = change(c, "not my password at all", NEW)
    assert response.status_code == 403 and "current password is not right" in response.text
    assert kinds_since(space, before) == ["desk-password-change-refused"]
    event = trail_events(space.desk.store, limit=2)[-1]
    assert event.body["why"] == "wrong current password" and event.body["account"] == "reviewer"
    assert accounts.account_standing(space.desk.store, reviewer(space).id).failures_since_success == 1
    # three failed sign-ins more and one more wrong current password: five in a row lock the account
    # (desk.yaml's default lock_after_failures, README "The reviewer's desk")
    for _ in range(3):
        assert login(client(space), "reviewer", "a wrong password!").status_code == 401
    response = change(c, "still not my password", NEW)
    assert "now locked" in response.text
    assert accounts.account_standing(space.desk.store, reviewer(space).id).locked
    assert c.get("/", follow_redirects=False).headers["location"] == "/login"  # the session ended with the lock
    assert login(client(space), "reviewer", OLD).status_code == 401
    assert reviewer(space).credentials_version == 0 and key_files(space) == ["reviewer.p12"]


@pytest.mark.parametrize("token", [None, "", "forged-token"])
def test_a_change_without_the_sessions_csrf_token_is_refused_and_changes_nothing(space, token):
    c = signed_in(space)
    before = trail_length(space.desk.store)
    data = {"current": OLD, "new": NEW, "repeat": NEW}
    if token is not None:
        data["csrf"] = token
    response = c.post("/password", data=data)
    assert response.status_code == 403 and "did not come from the desk" in response.text
    assert trail_length(space.desk.store) == before and reviewer(space).credentials_version == 0
    assert login(client(space), "reviewer", OLD).status_code == 303


@pytest.mark.parametrize(("new", "repeat", "says"), [
    ("eleven char", None, "at least 12 characters"),  # the policy of lotgate users add (accounts.MIN_PASSWORD)
    (NEW, NEW + "x", "differ"),
    (OLD, None, "is the current one"),
])
def test_the_new_password_meets_the_policy_of_users_add(space, new, repeat, says):
    c = signed_in(space)
    before = trail_length(space.desk.store)
    response = change(c, OLD, new, repeat)
    assert response.status_code == 400 and says in response.text
    assert trail_length(space.desk.store) == before  # refused before any record: not a failed attempt
    assert reviewer(space).credentials_version == 0
    with pytest.raises(InputError, match="at least 12 characters"):  # the same rule refuses a new account
        from flows.desk.accounts import create_account
        create_account(space.desk.ws, space.desk.store, "shorty", DeskRole.VIEWER, "eleven char", by="test")


def test_stopped_after_the_re_seal_before_the_record_the_old_password_still_works(space, monkeypatch):
    # The process dies between the new sealed file's rename and the transaction: nothing after runs
    # (no clean-up), so the new file stays on disk, named by no record.
    def dies(*args, **kwargs):
        raise KeyboardInterrupt("killed")

    monkeypatch.setattr(accounts, "set_credentials", dies)
    monkeypatch.setattr(passwords, "_forget_unrecorded", lambda *a: None)
    with pytest.raises(KeyboardInterrupt):
        passwords.change_password(space.desk, reviewer(space).id, current=OLD, new=NEW, repeat=NEW, client="test")
    monkeypatch.undo()
    assert key_files(space) == ["reviewer+1.p12", "reviewer.p12"]
    assert login(client(space), "reviewer", NEW).status_code == 401
    c = signed_in(space, password=OLD)
    assert reject(c, "LLC-9000-101", OLD).status_code == 200  # the old password opens the key in force
    # the next change removes the file the stopped one left, and goes through
    assert change(c, OLD, NEW).status_code == 200
    assert key_files(space) == ["reviewer+1.p12"]
    assert reject(signed_in(space, password=NEW), "LLC-9000-102", NEW).status_code == 200


def test_a_refused_record_removes_the_new_sealed_file(space, monkeypatch):
    def refuses(*args, **kwargs):
        raise InputError("the store refused")

    monkeypatch.setattr(accounts, "set_credentials", refuses)
    c = signed_in(space)
    assert change(c, OLD, NEW).status_code == 400
    assert key_files(space) == ["reviewer.p12"]


def test_stopped_after_the_record_before_the_old_file_is_removed_the_new_password_works(space, monkeypatch):
    def dies(*args, **kwargs):
        raise KeyboardInterrupt("killed")

    monkeypatch.setattr(passwords, "_remove_former", dies)
    with pytest.raises(KeyboardInterrupt):
        passwords.change_password(space.desk, reviewer(space).id, current=OLD, new=NEW, repeat=NEW, client="test")
    monkeypatch.undo()
    assert key_files(space) == ["reviewer+1.p12", "reviewer.p12"]
    assert login(client(space), "reviewer", OLD).status_code == 401
    c = signed_in(space, password=NEW)
    assert reject(c, "LLC-9000-101", NEW).status_code == 200
    # the leftover (sealed under the old password) goes with the next change
    assert change(c, NEW, NEW + " two").status_code == 200
    assert key_files(space) == ["reviewer+2.p12"]


def _reset(space, *extra, password="set by the administrator 1"):
    return run_cli(["users", "reset-password", "reviewer", *extra, "--workspace", space.root],
                   env={**os.environ, "LOTGATE_DESK_PASSWORD": password})


def test_reset_password_without_the_pkcs12_leaves_no_signing_key_and_asks_for_a_new_password(space):
    earlier = signed_in(space)
    done = _reset(space)
    assert done.returncode == 0, done.stderr
    assert "cannot sign at the desk now" in done.stdout and "sealed under the old password" in done.stdout
    assert "--signer-p12" in done.stdout
    assert key_files(space) == []  # sealed under a password only the person knew: removed, not kept openable
    user = reviewer(space)
    assert user.key_file is None and user.credentials_version == 1
    assert earlier.get("/", follow_redirects=False).headers["location"] == "/login"  # the reset ended it
    listed = run_cli(["users", "list", "--workspace", space.root]).stdout
    assert re.search(r"^reviewer .*password set by the administrator, no signing key$", listed, re.M)
    assert login(client(space), "reviewer", OLD).status_code == 401
    c = signed_in(space, password="set by the administrator 1")
    assert c.get("/", follow_redirects=False).headers["location"] == "/password"
    assert 'id="must-change"' in c.get("/password").text
    refused = reject(c, "LLC-9000-101", "set by the administrator 1")
    assert refused.status_code == 403 and "Choose your own password first" in refused.text
    assert change(c, "set by the administrator 1", NEW).status_code == 200
    assert c.get("/", follow_redirects=False).status_code == 200
    no_key = reject(c, "LLC-9000-101", NEW)
    assert no_key.status_code == 403 and "since its password was reset" in no_key.text


def test_reset_password_with_the_persons_pkcs12_seals_it_under_the_new_password(space):
    people = space.root / "keys" / "people"
    other = _reset(space, "--signer-p12", people / "tomas.orlik" / "signer.p12",
                   "--p12-passphrase-file", people / "tomas.orlik" / "signer.passphrase")
    assert other.returncode != 0 and "Tomas Orlik" in (other.stdout + other.stderr)
    assert reviewer(space).credentials_version == 0 and key_files(space) == ["reviewer.p12"]
    done = _reset(space, "--signer-p12", people / "ines.varga" / "signer.p12",
                  "--p12-passphrase-file", people / "ines.varga" / "signer.passphrase")
    assert done.returncode == 0, done.stderr
    assert "imported again" in done.stdout and key_files(space) == ["reviewer+1.p12"]
    c = signed_in(space, password="set by the administrator 1")
    assert change(c, "set by the administrator 1", NEW).status_code == 200  # re-sealed once more, by the person
    assert key_files(space) == ["reviewer+2.p12"]
    signed = reject(c, "LLC-9000-101", NEW)
    assert signed.status_code == 200 and "Ines Varga (DEMO)" in signed.text


def test_no_password_and_no_password_hash_reaches_an_audit_event_or_the_decision_log(space):
    c = signed_in(space)
    change(c, "a wrong current one", NEW)
    assert change(c, OLD, NEW).status_code == 200
    assert _reset(space).returncode == 0
    secrets = [OLD, NEW, "a wrong current one", "set by the administrator 1"]
    with space.desk.store.session() as session:  # every hash ever stored: the accounts' first ones and the new
        hashes = [*session.scalars(select(DeskUser.password_hash)), *session.scalars(select(DeskCredentials.password_hash))]
    assert len(hashes) == 5 + 2 and all(h.startswith("$argon2") for h in hashes)
    kinds = {e.kind for e in trail_events(space.desk.store, limit=10_000)}
    assert {"desk-password-changed", "desk-password-change-refused", "desk-password-reset"} <= kinds
    trail = str([e.body for e in trail_events(space.desk.store, limit=10_000)])
    log = space.desk.ws.log.read_text(encoding="utf-8")
    for text in (trail, log):
        assert "$argon2" not in text
        for secret in [*secrets, *hashes]:
            assert secret not in text


def test_account_standing_reads_a_reset_and_the_persons_own_change():
    s = accounts.standing_of
    assert s(["password-reset"]).must_change_password
    assert not s(["password-reset", "login-succeeded", "password-changed"]).must_change_password
    assert s(["login-failed"] * 4 + ["password-reset"]).failures_since_success == 0
    assert s(["login-failed", "password-change-failed"]).failures_since_success == 2
