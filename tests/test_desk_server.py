"""The reviewer's desk over HTTP (Starlette's test client): sessions, CSRF, roles, signatures, escaping, files.

The workspace is simulated in the store (tests/desk_fixtures.py): its content is known, so each
check compares the page or the records with what was put there.
"""

import re
import warnings

import pytest

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from starlette.testclient import TestClient

from flows.desk.app import create_app
from flows.desk.roles import DeskRole
from pipeline.records import audit
from pipeline.records import desk_accounts as accounts
from pipeline.records.desk_queries import trail_events, trail_length
from tests.desk_fixtures import (
    HOSTILE_FILE,
    HOSTILE_LOT,
    HOSTILE_REASON,
    PASSWORDS,
    login_name,
    make_workspace,
)


@pytest.fixture(scope="module")
def space(tmp_path_factory):
    return make_workspace(tmp_path_factory.mktemp("desk") / "ws")


class Clock:
    def __init__(self):
        self.now = 1000.0

    def __call__(self):
        return self.now


def client(space, clock=None):
    return TestClient(create_app(space.desk, clock=clock), base_url="https://testserver")


def csrf_of(html):
    return re.search(r'name="csrf" value="([^"]+)"', html).group(1)


def login(c, role, password=None):
    token = csrf_of(c.get("/login").text)
    return c.post("/login", data={"csrf": token, "name": login_name(role),
                                  "password": PASSWORDS[role] if password is None else password},
                  follow_redirects=False)


def signed_in(space, role, clock=None):
    c = client(space, clock)
    assert login(c, role).status_code == 303
    return c


def counts(space):
    store = space.desk.store
    return len(store.decisions()), trail_length(store)


def test_every_route_but_the_login_page_needs_a_session(space):
    c = client(space)
    app = c.app
    checked = 0
    for route in app.routes:
        if route.path in ("/login", "/static/desk.css"):
            continue
        path = route.path.replace("{path:path}", "reports/LLC-9000-001_r1_batch-report.pdf")
        for method in route.methods - {"HEAD"}:
            response = c.request(method, path, follow_redirects=False)
            checked += 1
            if method == "GET":
                assert response.status_code == 303 and response.headers["location"] == "/login", path
            else:
                assert response.status_code == 401, path
            assert "LLC-9000" not in response.text
    assert checked == 14  # every route of the desk but the sign-in page and its stylesheet


def test_cookies_and_security_headers(space):
    c = client(space)
    response = login(c, DeskRole.VIEWER)
    cookie = response.headers["set-cookie"].lower()
    assert "lotgate_desk=" in cookie and "secure" in cookie and "httponly" in cookie and "samesite=strict" in cookie
    page = c.get("/")
    csp = page.headers["content-security-policy"]
    assert "default-src 'self'" in csp and "frame-ancestors 'none'" in csp and "script-src 'none'" in csp
    assert page.headers["x-content-type-options"] == "nosniff"
    assert page.headers["referrer-policy"] == "no-referrer"
    assert "<script" not in page.text and " style=" not in page.text  # nothing the policy would have to allow


def test_the_morning_view_lists_held_lots_first_and_reconciles(space):
    text = signed_in(space, DeskRole.VIEWER).get("/").text
    order = [text.index(x) for x in ("Held: out of specification", "Held: out of trend", "Overdue",
                                     "Pending", "Ready for release")]
    assert order == sorted(order)
    assert "The counts reconcile." in text
    assert "1 = 0 + 1" in text  # the night's summary: received = archived + quarantined


def test_forms_without_the_right_csrf_token_are_refused_and_write_nothing(space):
    c = signed_in(space, DeskRole.REVIEWER)
    before = counts(space)
    for token in (None, "", "forged-token"):
        data = {"lot": "LLC-9000-101", "act": "reject", "reason": "x", "password": PASSWORDS[DeskRole.REVIEWER]}
        if token is not None:
            data["csrf"] = token
        response = c.post("/lot/sign", data=data)
        assert response.status_code == 403 and "did not come from the desk" in response.text
        assert c.post("/logout", data={} if token is None else {"csrf": token}).status_code == 403
    assert counts(space) == before
    fresh = client(space)  # the sign-in form's own token must come back with it
    assert fresh.post("/login", data={"name": "reviewer", "password": PASSWORDS[DeskRole.REVIEWER]}).status_code == 403


ACTS = {
    "approve": lambda c: c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-103",
                                                   "act": "approve", "reason": "r", "password": "not it, wrong"}),
    "release": lambda c: c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-103",
                                                   "act": "release", "reason": "r", "password": "not it, wrong"}),
    "reject": lambda c: c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-101",
                                                  "act": "reject", "reason": "r", "password": "not it, wrong"}),
    "re-baseline": lambda c: c.post("/chart/rebaseline", data={
        "csrf": csrf_of(c.get("/").text), "product": "LLC-200", "attribute": "specific_activity", "reason": "r",
        "password": "not it, wrong"}),
    "investigate": lambda c: c.post("/lot/investigate", data={
        "csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-105", "test": "lead", "outcome": "invalidated",
        "reference": "INV-1", "reason": "r", "retest_plan": "p", "password": "not it, wrong"}),
    "users": lambda c: c.get("/users"),
}
ALLOWED = {DeskRole.VIEWER: set(), DeskRole.REVIEWER: {"approve", "release", "reject"},
           DeskRole.INVESTIGATOR: {"investigate"},
           DeskRole.CHART_OWNER: {"re-baseline"}, DeskRole.ADMINISTRATOR: {"users"}}


@pytest.mark.parametrize("role", list(DeskRole))
def test_each_role_does_exactly_its_acts(space, role):
    # An act a role may do gets past the role check (to the password, refused here: wrong on purpose);
    # an act it may not do is refused for the role, before any password is looked at.
    c = signed_in(space, role)
    for act, call in ACTS.items():
        response = call(c)
        if act in ALLOWED[role]:
            assert "does not allow" not in response.text, (role, act)
            assert response.status_code == 200 or "password is not right" in response.text, (role, act)
        else:
            assert response.status_code == 403 and "does not allow" in response.text, (role, act)
    accounts.record_account_event(space.desk.store, accounts.user_by_login(space.desk.store, login_name(role)).id,
                                  accounts.UNLOCKED, "test reset", [])


def _acts(events):
    """The events of acts, without the records-written events that name each transaction's rows."""
    return [e for e in events if e.kind != "records-written"]


def test_a_wrong_password_at_signing_refuses_and_writes_only_the_failed_attempt(space):
    c = signed_in(space, DeskRole.REVIEWER)
    store = space.desk.store
    decisions, events = counts(space)
    files = sorted(p.name for p in space.root.rglob("*") if p.is_file() and "keys" not in p.parts)
    response = c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-101", "act": "reject",
                                         "reason": "looked at it", "password": "reviewer password 2025"})
    assert response.status_code == 403 and "nothing was signed" in response.text
    assert len(store.decisions()) == decisions
    new = _acts(trail_events(store)[: trail_length(store) - events])
    assert [e.kind for e in new] == ["desk-signature-refused"]
    assert new[0].body["account"] == "reviewer" and new[0].body["why"] == "wrong password"
    assert sorted(p.name for p in space.root.rglob("*") if p.is_file() and "keys" not in p.parts) == files
    assert audit.verify_trail(store, space.desk.ws.log).valid


def test_reject_and_rebaseline_through_the_desk_show_the_manifestation(space):
    store = space.desk.store
    c = signed_in(space, DeskRole.REVIEWER)
    form = c.get("/lot/sign", params={"id": "LLC-9000-101", "act": "reject"}).text
    assert "must not be released" in form  # the meaning, shown before signing
    response = c.post("/lot/sign", data={"csrf": csrf_of(form), "lot": "LLC-9000-101", "act": "reject",
                                         "reason": "trend confirmed by re-assay",
                                         "password": PASSWORDS[DeskRole.REVIEWER]})
    assert response.status_code == 200 and "Ines Varga (DEMO)" in response.text
    assert re.search(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d CET \(UTC\+01:00\)", response.text)
    latest = store.latest_decision("LLC-9000-101")
    assert latest.revision == 2 and latest.disposition == "rejected" and latest.decided_by == "Ines Varga (DEMO)"
    assert latest.record.person_signature  # signed with the person's unsealed identity, as lotgate decide does
    kinds = [e.kind for e in trail_events(store, lot_id="LLC-9000-101")]
    assert kinds[:2] == ["desk-signature", "person-disposition"]

    owner = signed_in(space, DeskRole.CHART_OWNER)
    page = owner.get("/chart", params={"product": "LLC-200", "attribute": "specific_activity"}).text
    response = owner.post("/chart/rebaseline", data={
        "csrf": csrf_of(page), "product": "LLC-200", "attribute": "specific_activity", "count": "6",
        "reason": "process change: new resin", "password": PASSWORDS[DeskRole.CHART_OWNER]})
    assert response.status_code == 200 and "Lena Marsh (DEMO)" in response.text
    limits = store.limit_versions("LLC-200", "specific_activity")[-1]
    assert limits.frozen_by == "Lena Marsh (DEMO)" and len(limits.baseline_lots) == 6
    # Centre of the six released values 201, 202, 203, 204, 200, 201 (the fixture's own numbers).
    assert limits.center == pytest.approx(1211 / 6)
    assert audit.verify_trail(store, space.desk.ws.log).valid


def test_five_failed_sign_ins_lock_the_account_until_the_administrator_unlocks_it(space):
    c = client(space)
    for _ in range(5):
        assert login(c, DeskRole.INVESTIGATOR, "a wrong password!").status_code == 401
    assert login(c, DeskRole.INVESTIGATOR).status_code == 401  # the right password, on a locked account
    kinds = [e.kind for e in _acts(trail_events(space.desk.store, limit=6))]
    assert "desk-account-locked" in kinds
    admin = signed_in(space, DeskRole.ADMINISTRATOR)
    page = admin.get("/users").text
    assert "locked" in page
    assert admin.post("/users/unlock", data={"csrf": csrf_of(page), "login": "investigator"},
                      follow_redirects=False).status_code == 303
    assert login(c, DeskRole.INVESTIGATOR).status_code == 303


def test_sessions_end_after_inactivity_and_at_logout(space):
    clock = Clock()
    c = signed_in(space, DeskRole.VIEWER, clock)
    clock.now += 14 * 60
    assert c.get("/", follow_redirects=False).status_code == 200
    clock.now += 15 * 60 + 1
    assert c.get("/", follow_redirects=False).status_code == 303
    c = signed_in(space, DeskRole.VIEWER, clock)
    token = csrf_of(c.get("/").text)
    assert c.post("/logout", data={"csrf": token}, follow_redirects=False).status_code == 303
    assert c.get("/", follow_redirects=False).status_code == 303
    assert _acts(trail_events(space.desk.store, limit=2))[0].kind == "desk-logout"


def test_hostile_lot_numbers_reasons_and_file_names_come_out_escaped(space):
    c = signed_in(space, DeskRole.REVIEWER)
    pages = [c.get("/").text, c.get("/lot", params={"id": HOSTILE_LOT}).text,
             c.get("/audit", params={"lot": HOSTILE_LOT}).text,
             c.get("/lot/sign", params={"id": HOSTILE_LOT, "act": "reject"}).text]
    for html in pages:
        assert "<script>alert(1)" not in html and "<img src=x" not in html and "<b>bold</b>" not in html
        assert "<i>x</i>" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in pages[0] and "&lt;img src=x onerror=alert(2)&gt;" in pages[0]
    assert "lims-&lt;i&gt;x&lt;/i&gt;.csv" in pages[0]
    assert HOSTILE_REASON not in pages[1] and HOSTILE_FILE not in pages[0]


@pytest.mark.parametrize("path", ["../lotgate.db", "..%2Flotgate.db", "reports/../lotgate.db",
                                  "%2Fetc%2Fpasswd", "keys/desk/reviewer.p12", "reports/.hidden",
                                  "decisions.jsonl", "reports/link-out.pdf"])
def test_document_links_cannot_leave_the_served_folders(space, path):
    target = space.root / "reports" / "link-out.pdf"
    if not target.is_symlink():
        target.symlink_to(space.root / "lotgate.db")
    c = signed_in(space, DeskRole.VIEWER)
    response = c.get(f"/files/{path}")
    assert response.status_code in (404, 303) and b"SQLite" not in response.content


def test_a_served_document_is_the_file_itself(space):
    c = signed_in(space, DeskRole.VIEWER)
    response = c.get("/files/reports/LLC-9000-001_r1_batch-report.pdf")
    assert response.status_code == 200 and response.content == b"%PDF-1.4 test\n"
    assert response.headers["content-type"] == "application/pdf"
    assert response.headers["x-content-type-options"] == "nosniff"


def test_wrong_passwords_at_signing_lock_the_account_and_end_its_session(space):
    c = signed_in(space, DeskRole.CHART_OWNER)
    page = c.get("/chart", params={"product": "LLC-200", "attribute": "specific_activity"}).text
    for attempt in range(5):
        response = c.post("/chart/rebaseline", data={
            "csrf": csrf_of(page), "product": "LLC-200", "attribute": "specific_activity", "reason": "r",
            "password": f"wrong {attempt} password"})
        assert "password is not right" in response.text
    assert "now locked" in response.text
    assert c.get("/", follow_redirects=False).status_code == 303  # the session ended with the lock
    user = accounts.user_by_login(space.desk.store, "chartowner")
    assert accounts.account_standing(space.desk.store, user.id).locked
    accounts.record_account_event(space.desk.store, user.id, accounts.UNLOCKED, "test reset", [])


def test_a_desk_signature_writes_what_the_command_line_writes(space, tmp_path):
    # The same lot decision through `lotgate decide`'s use case (the person's own PKCS#12) and through the
    # desk (the sealed copy, opened by the password): the same record fields and the same audit events,
    # plus the desk's own desk-signature event. A reason typed with markup comes back escaped.
    from pipeline.night.person_decision import decide_lot
    from pipeline.records import signing

    store, ws = space.desk.store, space.desk.ws
    p12, passphrase = space.root.joinpath("keys", "people", "ines.varga", "signer.p12"), \
        space.root.joinpath("keys", "people", "ines.varga", "signer.passphrase")
    identity = signing.load_identity(p12, passphrase_file=passphrase, passphrase_env="")
    decide_lot(ws, store, "LLC-9000-104", release=False, reason="checked on the command line", identity=identity)
    c = signed_in(space, DeskRole.REVIEWER)
    reason = "checked at the desk <script>alert(3)</script>"
    response = c.post("/lot/sign", data={"csrf": csrf_of(c.get("/").text), "lot": "LLC-9000-102", "act": "reject",
                                         "reason": reason, "password": PASSWORDS[DeskRole.REVIEWER]})
    assert response.status_code == 200 and "<script>alert(3)" not in response.text
    by_cli, by_desk = store.latest_decision("LLC-9000-104"), store.latest_decision("LLC-9000-102")
    assert set(by_cli.record.to_json()) == set(by_desk.record.to_json())
    assert (by_cli.decided_by, by_cli.record.meaning, by_cli.disposition) == \
        (by_desk.decided_by, by_desk.record.meaning, by_desk.disposition)
    assert by_desk.record.reasons == (f"decision of Ines Varga (DEMO): {reason}",)
    cli_events = [e for e in trail_events(store, lot_id="LLC-9000-104")]
    desk_events = [e for e in trail_events(store, lot_id="LLC-9000-102")]
    assert [e.kind for e in cli_events][0] == "person-disposition"
    assert [e.kind for e in desk_events][:2] == ["desk-signature", "person-disposition"]
    assert set(cli_events[0].body) == set(desk_events[1].body)
    history = c.get("/audit", params={"lot": "LLC-9000-102"}).text
    assert "&lt;script&gt;alert(3)&lt;/script&gt;" in history and "<script>alert(3)" not in history


def test_the_morning_view_links_every_charted_attribute(space):
    # The shipped LLC-200 specification charts activity, specific activity and Km (specs/products/LLC-200.yaml).
    c = signed_in(space, DeskRole.VIEWER)
    text = c.get("/").text
    for code in ("activity", "specific_activity", "km"):
        assert f"/chart?product=LLC-200&amp;attribute={code}\"" in text
    chart = c.get("/chart", params={"product": "LLC-200", "attribute": "specific_activity"})
    assert chart.status_code == 200 and "<svg" in chart.text and "<script" not in chart.text
    assert c.get("/chart", params={"product": "LLC-200", "attribute": "nope"}).status_code == 404


def test_an_investigator_records_a_signed_oos_outcome_at_the_desk(space):
    # The lot's lead result 7.0 mg/kg stands out of specification (the fixture's record); the
    # investigator signs "result invalidated" with the password: the same use case as
    # lotgate investigate writes the outcome, the result's new standing and the chained events.
    from pipeline.records.lot_record_store import load_histories

    store = space.desk.store
    c = signed_in(space, DeskRole.INVESTIGATOR)
    page = c.get("/lot", params={"id": "LLC-9000-105"}).text
    assert 'id="investigate"' in page and "assignable laboratory cause" in page
    response = c.post("/lot/investigate", data={
        "csrf": csrf_of(page), "lot": "LLC-9000-105", "test": "lead", "outcome": "invalidated",
        "reference": "INV-2026-090", "reason": "digestion blank contaminated, confirmed by the lab",
        "retest_plan": "retest in duplicate from the retained sample", "password": PASSWORDS[DeskRole.INVESTIGATOR]})
    assert response.status_code == 200 and "Tomas Orlik (DEMO)" in response.text
    history = load_histories(store, ["LLC-9000-105"])["LLC-9000-105"]
    (investigation,) = history.investigations
    assert (investigation.reference, investigation.decided_by) == ("INV-2026-090", "Tomas Orlik (DEMO)")
    assert [r.status for r in history.results] == ["invalidated"]
    kinds = [e.kind for e in _acts(trail_events(store, lot_id="LLC-9000-105"))]
    assert "investigation-outcome" in kinds
    # A reviewer may not record it (the register gives Ines Varga no result-invalidation role either).
    reviewer = signed_in(space, DeskRole.REVIEWER)
    refused = reviewer.post("/lot/investigate", data={
        "csrf": csrf_of(reviewer.get("/").text), "lot": "LLC-9000-105", "test": "lead", "outcome": "confirmed",
        "reference": "INV-2026-091", "reason": "a second outcome on the same result", "retest_plan": "",
        "password": PASSWORDS[DeskRole.REVIEWER]})
    assert refused.status_code == 403 and "does not allow" in refused.text

