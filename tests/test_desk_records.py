"""The desk's records and files: sealed signing identities, the night's static review page, desk settings,
and the account standing read from append-only events."""

import hashlib
import re

import pytest

from flows.desk.keystore import seal_identity, unseal_identity
from flows.desk.settings import DeskSettings, check_cookie_setting, read_desk_settings
from flows.desk.static_page import write_night_page
from flows.desk.views import document_path
from pipeline.errors import SigningError, SpecificationError
from pipeline.records import desk_accounts as accounts
from pipeline.records import signing
from pipeline.records.demo_identity import create_demo_identity
from tests.desk_fixtures import HOSTILE_LOT, make_workspace


def test_a_sealed_identity_opens_only_with_the_desk_password_and_refuses_a_changed_file(tmp_path):
    person = create_demo_identity(tmp_path / "person", "Brackwater Enzymes (test)", "Ines Varga")
    root = tmp_path / "ws"
    root.mkdir()
    sealed = seal_identity(root, "ines", person.p12_path, None, "a desk password 1",
                           p12_passphrase_file=person.passphrase_path)
    path = root / sealed.key_file
    assert path.stat().st_mode & 0o777 == 0o600
    original = signing.load_identity(person.p12_path, passphrase_file=person.passphrase_path, passphrase_env="")
    assert sealed.certificate_sha256 == original.fingerprint_sha256 and sealed.signer_name == "Ines Varga (DEMO)"
    assert sealed.key_sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    # The file is no longer opened by the original passphrase: only the desk password opens it.
    with pytest.raises(SigningError):
        signing.load_identity(path, passphrase=person.passphrase_path.read_bytes().strip(), passphrase_env="")
    with pytest.raises(SigningError):
        unseal_identity(root, sealed.key_file, sealed.key_sha256, sealed.certificate_sha256, "wrong password!!")
    opened = unseal_identity(root, sealed.key_file, sealed.key_sha256, sealed.certificate_sha256, "a desk password 1")
    assert opened.fingerprint_sha256 == original.fingerprint_sha256
    data = bytearray(path.read_bytes())
    data[-1] ^= 1
    path.write_bytes(bytes(data))
    with pytest.raises(SigningError, match="changed since the account was made"):
        unseal_identity(root, sealed.key_file, sealed.key_sha256, sealed.certificate_sha256, "a desk password 1")


def test_the_night_page_is_self_contained_and_escaped(tmp_path):
    space = make_workspace(tmp_path / "ws")
    path = write_night_page(space.desk.ws, space.desk.store, 1)
    assert path == space.root / "review" / "night-0001.html"
    html = path.read_text(encoding="utf-8")
    assert "default-src 'none'" in html  # the page may load nothing at all
    assert "<script" not in html and not re.findall(r"<[^>]+\s(?:src|href|action)=", html)
    assert "<form" not in html
    assert "Held: out of specification" in html and "The counts reconcile." in html
    assert HOSTILE_LOT not in html and "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_desk_settings_are_read_strictly(tmp_path):
    assert read_desk_settings(tmp_path) == DeskSettings()
    (tmp_path / "desk.yaml").write_text("session_timeout_minutes: 30\nsecure_cookies: false\n")
    assert read_desk_settings(tmp_path) == DeskSettings(1800.0, 5, False)
    check_cookie_setting(read_desk_settings(tmp_path), "127.0.0.1")
    with pytest.raises(SpecificationError, match="loopback"):
        check_cookie_setting(read_desk_settings(tmp_path), "0.0.0.0")  # noqa: S104 (the refused case)
    (tmp_path / "desk.yaml").write_text("session_timeout_minuts: 30\n")
    with pytest.raises(SpecificationError, match="session_timeout_minuts"):
        read_desk_settings(tmp_path)
    (tmp_path / "desk.yaml").write_text("session_timeout_minutes: '15'\n")
    with pytest.raises(SpecificationError, match="session_timeout_minutes"):
        read_desk_settings(tmp_path)


def test_account_standing_counts_failures_since_the_last_success_and_locks_until_unlocked():
    s = accounts.standing_of
    assert s([]) == accounts.AccountStanding(0, False)
    assert s(["login-failed", "login-failed", "login-succeeded", "signing-password-failed"]).failures_since_success == 1
    assert s(["login-failed"] * 5 + ["locked"]).locked
    assert s(["login-failed"] * 5 + ["locked", "unlocked"]) == accounts.AccountStanding(0, False)


def test_document_path_checks(tmp_path):
    (tmp_path / "reports").mkdir()
    (tmp_path / "reports" / "a.pdf").write_bytes(b"x")
    (tmp_path / "secret.txt").write_text("s")
    (tmp_path / "reports" / "out.pdf").symlink_to(tmp_path / "secret.txt")
    allowed = ("reports",)
    assert document_path(tmp_path, "reports/a.pdf", allowed) == (tmp_path / "reports" / "a.pdf").resolve()
    for bad in ("../secret.txt", "reports/../secret.txt", "/etc/passwd", "secret.txt", "reports/out.pdf",
                "reports/.a.pdf", "reports\\..\\secret.txt", "", "reports/a.pdf\x00"):
        assert document_path(tmp_path, bad, allowed) is None, bad


@pytest.mark.postgres
@pytest.mark.slow
def test_accounts_sign_in_and_lock_on_postgresql(tmp_path):
    # The desk's writes take the run lock (an advisory lock on PostgreSQL) and chain their audit events.
    from flows.desk.accounts import Desk, SignInRefused, create_account, sign_in
    from flows.desk.roles import DeskRole
    from pipeline.records import audit
    from pipeline.records.desk_queries import trail_events
    from pipeline.records.store import Store
    from pipeline.records.workspace import open_workspace, write_settings
    from tests.pg import fresh_database

    url, drop = fresh_database()
    try:
        write_settings(tmp_path, {"plant_name": "Brackwater Enzymes (test)", "database_url": url})
        ws = open_workspace(tmp_path)
        store = Store(ws.database_url)
        desk = Desk(ws, store, DeskSettings(lock_after_failures=3))
        create_account(ws, store, "vera", DeskRole.VIEWER, "vera's password 1", by="test")
        assert sign_in(desk, "vera", "vera's password 1", "127.0.0.1").login == "vera"
        for _ in range(3):
            with pytest.raises(SignInRefused):
                sign_in(desk, "vera", "not her password", "127.0.0.1")
        with pytest.raises(SignInRefused):
            sign_in(desk, "vera", "vera's password 1", "127.0.0.1")
        user = accounts.user_by_login(store, "vera")
        assert accounts.account_kinds(store, user.id) == ["login-succeeded"] + ["login-failed"] * 3 + ["locked",
                                                                                                      "login-failed"]
        check = audit.verify_trail(store, ws.log)
        # 7 acts (account added, signed in, 3 failures, locked, refused) and the records-written event of
        # each of those transactions that added an account row or an account event
        acts = [e for e in trail_events(store) if e.kind != "records-written"]
        assert check.valid and len(acts) == 7 and check.store_records > 7, check.reason
        store.engine.dispose()
    finally:
        drop()


def test_an_add_that_stopped_before_its_account_was_stored_leaves_nothing_in_the_way(tmp_path):
    from flows.desk.accounts import create_account
    from flows.desk.roles import DeskRole
    from pipeline.records.store import Store
    from pipeline.records.workspace import open_workspace, write_settings

    root = tmp_path / "ws"
    write_settings(root, {"plant_name": "Brackwater Enzymes (test)"})
    ws = open_workspace(root)
    store = Store(ws.database_url)
    person = create_demo_identity(tmp_path / "person", ws.plant_name, "Ines Varga")
    orphan = root / "keys" / "desk" / "ines.p12"
    orphan.parent.mkdir(parents=True)
    orphan.write_bytes(b"left by a stopped add")  # a sealed file without its account (a kill in between)
    user = create_account(ws, store, "ines", DeskRole.REVIEWER, "a desk password 1", p12=person.p12_path,
                          p12_passphrase_file=person.passphrase_path, by="test")
    assert user.key_sha256 == hashlib.sha256(orphan.read_bytes()).hexdigest()
    with pytest.raises(Exception, match="already has an account named 'ines'"):
        create_account(ws, store, "ines", DeskRole.REVIEWER, "a desk password 1", p12=person.p12_path,
                       p12_passphrase_file=person.passphrase_path, by="test")
    assert user.key_sha256 == hashlib.sha256(orphan.read_bytes()).hexdigest()  # an account's key is never replaced
