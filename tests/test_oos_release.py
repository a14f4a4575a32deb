"""A person may not release what its results do not show fit: out-of-specification, undecided, missing.

Through the real night (the demo plant's simulator, pipeline/demo/plant.py, with each lot's true
activity chosen here) and the real command line (``lotgate decide``, ``lotgate investigate``), on
SQLite and PostgreSQL. The rule checked (FDA, *Investigating Out-of-Specification (OOS) Test
Results for Pharmaceutical Production*, 2006, from memory): an OOS result stands until a signed
investigation outcome; only "assignable laboratory cause: result invalidated" lets the retest
count; a confirmed OOS result allows only rejection; a passing retest never replaces an OOS
result by itself. Limits are those of the shipped specification specs/products/PGR-040.yaml
(specific activity 40.0 – 70.0 U/mg, total coliforms ≤ 30 CFU/g).
"""

import datetime as dt
import hashlib
import re
from dataclasses import replace

import numpy as np
import pytest
from sqlalchemy import inspect, text

from flows import cli
from pipeline.demo import plant as demo
from pipeline.records.demo_trust import create_demo_trust
from pipeline.release.lot_record import Investigation, LotHistory, LotResult
from pipeline.release.records import RecordedResult
from pipeline.release.release_bars import release_bars
from pipeline.vocabulary import InvestigationOutcome, ReleaseBar, ResultStatus, Verdict
from tests.pg import database_of
from tests.test_lot_record_nights import DAY, _files, _night, night_workspace

PERSON = "mira.castellan"  # the demo register's reviewer: release, rejection, result invalidation


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def database(request):
    yield from database_of(request.param, None)


def _protease(count=3, oos=(1, 2)):
    """Protease lots; those at ``oos`` with a specific activity at 64 % of the product's target (OOS)."""
    lots = demo._plan_lots(demo.PROTEASE, 0, DAY, count, np.random.default_rng(7))
    return [replace(lot, vmax_u_per_mg=demo.PROTEASE.vmax_u_per_mg * 0.64) if i in oos else lot
            for i, lot in enumerate(lots)]


def _snapshot(ws, store):
    """Rows of every table of the store, the decision log and every document: what 'nothing written' compares."""
    with store.engine.connect() as connection:
        rows = {t: connection.execute(text(f'select count(*) from "{t}"')).scalar_one()
                for t in inspect(connection).get_table_names()}
    files = {str(p.relative_to(ws.root)): hashlib.sha256(p.read_bytes()).hexdigest()
             for folder in (ws.certificates, ws.reports, ws.root / ".staging") if folder.exists()
             for p in sorted(folder.rglob("*")) if p.is_file()}
    return rows, ws.log.read_bytes() if ws.log.exists() else b"", files


def _signing(ws):
    p12, passphrase = create_demo_trust(ws.keys, demo.PLANT_NAME).identity_of(PERSON)
    return ["--identity", str(p12), "--passphrase-file", str(passphrase), "--workspace", str(ws.root)]


def _decide(ws, lot, capsys, *, release=True):
    code = cli.main(["decide", lot, "--release" if release else "--reject", "--reason",
                     "batch record and results reviewed", *_signing(ws)])
    return code, capsys.readouterr().err.strip()


def _investigate(ws, lot, capsys, outcome, reference):
    plan = ["--retest-plan", "re-assay on a fresh plate"] if outcome == "invalidated" else []
    code = cli.main(["investigate", lot, "--test", "specific_activity", "--outcome", outcome, "--reference", reference,
                     "--reason", "substrate stock prepared at half strength (preparation record)", *plan,
                     *_signing(ws)])
    capsys.readouterr()
    assert code == 0


def _refused(ws, store, lot, capsys):
    """``lotgate decide LOT --release``: exit 2 (refused input), one line, nothing written. Returns the line."""
    before = _snapshot(ws, store)
    code, err = _decide(ws, lot, capsys)
    assert code == 2, err
    assert "\n" not in err and "Traceback" not in err
    assert err.startswith(f"lotgate: lot {lot} cannot be released: ")
    assert _snapshot(ws, store) == before
    return err


def _oos_text(store, lot):
    """'Specific activity 34.3 U/mg' as the lot's current revision reports it (the value is the night's own)."""
    (result,) = [r for r in store.latest_decision(lot).record.results if r.code == "specific_activity"]
    assert result.verdict == "fail"
    return f"Specific activity {result.reported} U/mg"


def test_a_person_cannot_release_an_oos_lot_until_its_investigation_and_retest_allow_it(database, tmp_path, capsys):
    root = night_workspace(tmp_path / "w", database)
    rng = np.random.default_rng(11)
    lots = _protease()
    good, p2, p3 = (lot.lot_id for lot in lots)
    got, ws, store = _night(root, _files(DAY, [], lots, rng))
    assert {lot: label for lot, (_, label) in got.items()} == {
        good: "ready for release", p2: "held: out of specification", p3: "held: out of specification"}

    # 1. Held OOS, no investigation: refused, naming the result, its limit and what to do.
    err = _refused(ws, store, p2, capsys)
    assert f"{_oos_text(store, p2)} is out of specification (limit 40.0 – 70.0 U/mg)" in err
    assert "no investigation outcome is recorded" in err
    assert f"lotgate investigate {p2} --test specific_activity --outcome invalidated|confirmed" in err
    assert f"lotgate decide {p2} --reject" in err

    # 2. A passing retest without an investigation ("testing into compliance"): still held, still refused.
    retest = replace(lots[1], vmax_u_per_mg=demo.PROTEASE.vmax_u_per_mg)
    got, ws, store = _night(root, _files(DAY + dt.timedelta(1), [], [retest], rng, lims=False))
    assert got[p2] == (2, "held: out of specification")
    assert "no investigation outcome is recorded" in _refused(ws, store, p2, capsys)

    # 3. The OOS result invalidated by a signed outcome: the revision still shows it, so still refused.
    _investigate(ws, p2, capsys, "invalidated", "INV-T-1")
    err = _refused(ws, store, p2, capsys)
    assert f"{_oos_text(store, p2)} (limit 40.0 – 70.0 U/mg) was invalidated under investigation INV-T-1" in err

    # 4. The night decides the lot again with its retest: the person's release is allowed, and signed.
    got, ws, store = _night(root, _files(DAY + dt.timedelta(2), [], [retest], rng, lims=False))
    assert got[p2] == (3, "ready for release")
    code, err = _decide(ws, p2, capsys)
    assert code == 0, err
    released = store.latest_decision(p2)
    assert (released.revision, released.disposition, released.decided_by) == (4, "released", "Mira Castellan (DEMO)")
    assert (ws.certificates / released.record.certificate.file).is_file()

    # 5. Confirmed OOS: refused, rejection only; the rejection itself is recorded.
    _investigate(ws, p3, capsys, "confirmed", "INV-T-2")
    err = _refused(ws, store, p3, capsys)
    assert f"{_oos_text(store, p3)} is out of specification (limit 40.0 – 70.0 U/mg), confirmed under " \
           "investigation INV-T-2" in err
    assert f"allows only the lot's rejection (lotgate decide {p3} --reject)" in err
    assert "lotgate investigate" not in err
    code, err = _decide(ws, p3, capsys, release=False)
    assert code == 0, err
    assert store.latest_decision(p3).disposition == "rejected"
    if database:
        store.engine.dispose()


def test_an_undecided_result_is_not_released_by_a_person(database, tmp_path, capsys):
    # "< 50 CFU/g" against ≤ 30 CFU/g: values below 50 include 12 and 45, so it neither meets the limit
    # nor proves a failure (docs/assay-rules.md, "Judging by meaning"). No investigation outcome can be
    # recorded against it (it is not OOS); a retest whose range settles the limit is the way on.
    root = night_workspace(tmp_path / "w", database)
    (lot,) = _protease(count=1, oos=())
    files = _files(DAY, [], [lot], np.random.default_rng(11))
    (name,) = [n for n in files if n.startswith(f"lims-{lot.lot_id}")]
    files[name], replaced = re.subn(rb"(,COLI,)\d+(,CFU/g,)", rb"\g<1>< 50\g<2>", files[name])
    assert replaced == 1
    got, ws, store = _night(root, files)
    assert got[lot.lot_id] == (1, "held: undecided result")
    err = _refused(ws, store, lot.lot_id, capsys)
    assert "Total coliforms < 50 CFU/g does not show that the limit ≤ 30 CFU/g is met (undecided result)" in err
    assert "have the test done again" in err and "lotgate investigate" not in err
    code, err = _decide(ws, lot.lot_id, capsys, release=False)
    assert code == 0, err
    if database:
        store.engine.dispose()


# --- the rule itself (pure): which results bar a person's release

def _result(code, verdict, reported="1.0"):
    return RecordedResult(code, 1.0, reported, "mg/kg", verdict)


def _stored(attribute, verdict, result_id, status=ResultStatus.VALID):
    return LotResult(attribute, status, verdict, 7.0, "7.0", "mg/kg", None, "2026-11-26", "LIMS test PB",
                     "LIMS test PB", {}, result_id=result_id)


def _outcome(result_id, outcome, reference="INV-1"):
    return Investigation("lead", result_id, outcome, reference, "why", "plan", "A. Person", "2026-11-27T10:00:00+00:00")


def test_each_kind_of_result_that_bars_a_release():
    oos = LotHistory((_stored("lead", Verdict.FAIL, 1),))
    assert release_bars([_result("lead", "pass"), _result("km", "reported")], LotHistory()) == ()
    assert [b.bar for b in release_bars([_result("lead", "fail", "7.0")], oos)] == [ReleaseBar.OPEN_OOS]
    confirmed = replace(oos, investigations=(_outcome(1, InvestigationOutcome.CONFIRMED_OOS, "INV-9"),))
    (bar,) = release_bars([_result("lead", "fail", "7.0")], confirmed)
    assert (bar.bar, bar.reference, bar.reported) == (ReleaseBar.CONFIRMED_OOS, "INV-9", "7.0")
    invalidated = LotHistory((_stored("lead", Verdict.FAIL, 1, ResultStatus.INVALIDATED),),
                             (_outcome(1, InvestigationOutcome.RESULT_INVALIDATED, "INV-3"),))
    (bar,) = release_bars([_result("lead", "fail", "7.0")], invalidated)
    assert (bar.bar, bar.reference) == (ReleaseBar.INVALIDATED, "INV-3")
    # once the retest's revision shows a passing result, the invalidated one no longer bars anything
    assert release_bars([_result("lead", "pass")], invalidated) == ()
    assert [b.bar for b in release_bars([_result("coliforms", "undecided", "< 50")], LotHistory())] == \
        [ReleaseBar.UNDECIDED]
    assert [(b.attribute, b.bar) for b in release_bars([_result("pb", "missing"), _result("ph", "invalid")],
                                                       LotHistory())] == \
        [("pb", ReleaseBar.NO_VALID_RESULT), ("ph", ReleaseBar.NO_VALID_RESULT)]
    # an OOS result standing in the lot's record bars the release even when the revision does not show it
    (bar,) = release_bars([_result("lead", "pass")], oos)
    assert (bar.attribute, bar.bar, bar.reported) == ("lead", ReleaseBar.OPEN_OOS, "7.0")
    # a later valid OOS after an invalidated one stands again (a failed retest needs its own outcome)
    twice = LotHistory((*invalidated.results, _stored("lead", Verdict.FAIL, 2)), invalidated.investigations)
    assert [b.bar for b in release_bars([_result("lead", "fail", "7.0")], twice)] == [ReleaseBar.OPEN_OOS]


def test_an_outcome_recorded_after_the_retest_decides_the_lot_again_at_the_next_night(database, tmp_path, capsys):
    # The retest is often run while the investigation is open (its second phase) and reaches lotgate
    # before the outcome. The next night, with no data for the lot, decides it again from its record.
    root = night_workspace(tmp_path / "w", database)
    rng = np.random.default_rng(11)
    lots = _protease()
    _, p2, p3 = (lot.lot_id for lot in lots)
    _night(root, _files(DAY, [], lots, rng))
    retests = [replace(lot, vmax_u_per_mg=demo.PROTEASE.vmax_u_per_mg) for lot in lots[1:]]
    got, ws, store = _night(root, _files(DAY + dt.timedelta(1), [], retests, rng, lims=False))
    assert got[p2] == got[p3] == (2, "held: out of specification")  # the OOS results stand
    _investigate(ws, p2, capsys, "invalidated", "INV-T-3")
    _investigate(ws, p3, capsys, "confirmed", "INV-T-4")
    other = demo._plan_lots(demo.PROTEASE, 3, DAY + dt.timedelta(2), 1, np.random.default_rng(5))
    got, ws, store = _night(root, _files(DAY + dt.timedelta(2), [], other, rng))
    assert got[p2] == (3, "ready for release")  # the invalidated result gives way to the retest on record
    assert got[p3] == (3, "held: out of specification")  # a confirmed OOS result stands
    decided = store.latest_decision(p2).record
    assert {r.code: r.verdict for r in decided.results}["specific_activity"] == "pass"
    assert (ws.certificates / decided.certificate.file).is_file()
    got, ws, store = _night(root, _files(DAY + dt.timedelta(3), [], [], rng))
    assert p2 not in got and p3 not in got  # decided once: a further night without news leaves them
    code, err = _decide(ws, p2, capsys)
    assert code == 0, err
    if database:
        store.engine.dispose()
