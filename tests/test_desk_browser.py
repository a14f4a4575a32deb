"""The reviewer's desk in a real browser: Debian's chromium and chromedriver driven by Selenium.

The demo's nights run through the command line with the lots ready for release left unapproved;
the demo reviewer of the demo register gets an account with ``lotgate users add``; ``lotgate desk``
is started on a free port of 127.0.0.1 and stopped by its process id. The browser signs in, reads
the morning view and a held lot, approves a lot ready for release with the password and reads the
manifestation; another lot is approved with ``lotgate approve``, and the two acts' records are
compared; poppler's ``pdfsig`` (an outside verifier) then checks both certificates' two signatures. A night's static page is opened from the file
with the browser's resource timing checked: nothing is requested. Screenshots are kept in
tests/artifacts/desk/ (ignored by git).
"""

import os
import shutil
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from pipeline.records.pdf_verification import pdfsig_report
from tests.cli import run_cli, stop_session

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(not (Path("/usr/bin/chromium").exists() and Path("/usr/bin/chromedriver").exists()),
                       reason="Debian's chromium and chromium-driver are not installed"),
]
ARTIFACTS = Path(__file__).parent / "artifacts" / "desk"
PASSWORD = "tarnwick review 2026"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def demo_desk(tmp_path_factory):
    root = tmp_path_factory.mktemp("desk-demo") / "ws"
    # The demo's nights with the lots ready for release left for a person to approve.
    assert run_cli(["demo", "--workspace", root, "--leave-ready"]).returncode == 0
    person = root / "keys" / "people" / "mira.castellan"  # the demo reviewer, in the demo register of signers
    added = run_cli(["users", "add", "mira", "--role", "reviewer", "--signer-p12", person / "signer.p12",
                     "--p12-passphrase-file", person / "signer.passphrase", "--workspace", root],
                    env={**os.environ, "LOTGATE_DESK_PASSWORD": PASSWORD})
    assert added.returncode == 0, added.stderr
    (root / "desk.yaml").write_text("secure_cookies: false  # plain HTTP on the loopback, for this test only\n")
    port = free_port()
    log = open(root.parent / "desk.log", "wb")  # noqa: SIM115 (closed below)
    server = subprocess.Popen([sys.executable, "-m", "flows.cli", "desk", "--workspace", str(root), "--port",
                               str(port)], stdout=log, stderr=log, stdin=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                time.sleep(0.3)
        else:
            pytest.fail("the desk did not start: " + (root.parent / "desk.log").read_text())
        yield root, f"http://127.0.0.1:{port}"
    finally:
        stop_session(server.pid)
        log.close()


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = "/usr/bin/chromium"
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--window-size=1300,1600",
                 f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(executable_path="/usr/bin/chromedriver"), options=options)
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    try:
        yield driver
    finally:
        driver.quit()


def shot(driver, name):
    path = ARTIFACTS / f"{name}.png"
    driver.save_screenshot(str(path))
    print(f"screenshot: {path}")


def test_sign_in_review_and_approve_with_the_password(demo_desk, browser):
    from selenium.webdriver.common.by import By

    root, url = demo_desk
    browser.get(url + "/")
    assert browser.current_url.endswith("/login")
    browser.find_element(By.NAME, "name").send_keys("mira")
    browser.find_element(By.NAME, "password").send_keys(PASSWORD)
    shot(browser, "1-sign-in")
    browser.find_element(By.ID, "sign-in").click()
    headings = [h.text for h in browser.find_elements(By.CSS_SELECTOR, "section.group h2")]
    shot(browser, "2-morning-view")
    # The demo's holds at the end of its nights (README: what the demo produces), held first in
    # reading order, then the lots pending and ready for release.
    assert [h.rsplit(" ", 1)[0] for h in headings] == [
        "Held: out of specification", "Held: incomplete", "Held: out of trend",
        "Overdue: a required result is past its turnaround", "Pending: results still due",
        "Ready for release: awaiting an authorised person"], headings
    assert "The counts reconcile." in browser.page_source

    browser.find_element(By.LINK_TEXT, "PGR-2611-017").click()
    assert "out of specification" in browser.page_source and "<svg" in browser.page_source
    shot(browser, "3-held-lot-out-of-specification")

    browser.get(url + "/lot?id=LLC-2611-030")
    browser.find_element(By.ID, "approve").click()
    assert "I have reviewed this certificate" in browser.page_source  # the meaning, before signing
    browser.find_element(By.NAME, "reason").send_keys("results, assay validity and the prepared certificate reviewed")
    browser.find_element(By.NAME, "password").send_keys(PASSWORD)
    shot(browser, "4-signing")
    browser.find_element(By.ID, "sign").click()
    shown = browser.find_element(By.ID, "manifestation").text
    shot(browser, "5-manifestation")
    assert "Mira Castellan (DEMO)" in shown and "CET (UTC+01:00)" in shown
    assert "I have reviewed this certificate" in shown

    # The same act on another lot with the command line: the same records and the same two signatures.
    person = root / "keys" / "people" / "mira.castellan"
    by_cli = run_cli(["approve", "LLC-2611-031", "--reason", "results, assay validity and the certificate reviewed",
                      "--identity", person / "signer.p12", "--passphrase-file", person / "signer.passphrase",
                      "--workspace", root])
    assert by_cli.returncode == 0, by_cli.stdout + by_cli.stderr
    from pipeline.night.open import open_records

    _, store = open_records(root)
    desk, cli = store.latest_decision("LLC-2611-030"), store.latest_decision("LLC-2611-031")
    assert (desk.disposition, desk.decided_by, desk.record.meaning) == (cli.disposition, cli.decided_by,
                                                                       cli.record.meaning)
    assert set(desk.record.to_json()) == set(cli.record.to_json()) and desk.record.person_signature
    for lot, decision in (("LLC-2611-030", desk), ("LLC-2611-031", cli)):
        certificate = root / "certificates" / f"{lot}_r{decision.revision}_certificate.pdf"
        assert certificate.exists()
        if shutil.which("pdfsig"):
            ok, text = pdfsig_report(certificate)
            assert ok and text.count("Signature is Valid.") == 2 and "Mira Castellan (DEMO)" in text, text
            assert "lotgate system" in text
        checked = run_cli(["verify", "--workspace", root, certificate])
        assert checked.returncode == 0, checked.stdout
    assert run_cli(["verify", "--workspace", root]).returncode == 0  # records, chain, checkpoints, archive


def test_the_static_page_of_a_demo_night_loads_nothing(demo_desk, browser):
    from selenium.webdriver.common.by import By

    root, _ = demo_desk
    page = root / "review" / "night-0004.html"
    assert page.exists()  # written by the night itself
    browser.get(page.as_uri())
    assert browser.find_element(By.TAG_NAME, "h1").text.startswith("Night 4")
    assert "Held: out of specification" in browser.page_source
    entries = browser.execute_script("return performance.getEntriesByType('resource').map(e => e.name)")
    assert entries == []
    shot(browser, "6-static-night-page")
