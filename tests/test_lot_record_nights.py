"""A lot's record across nights, night by night through the real night, on SQLite and PostgreSQL.

Simulation with known truth (the demo plant's simulator, pipeline/demo/plant.py): every lot's
true activity, protein and Km are chosen here, so the expected disposition of each night follows
from the rules under test (the lot record: FDA OOS guidance of 2006, from memory; invalid runs
repeated, common practice). "Released" below is the night's "ready for release" (release mode
'approval': an authorised person approves):

night 1  lipase L1–L4 on a plate whose reference standard recovers 82 % (window 90–110 %): held,
         invalid assay; protease P1 released; P2 specific activity 64 % of target: held, OOS;
         P3 and P4 (made 5 days earlier) without their microbiology (turnaround 5 days): pending
night 2  L1–L4 re-assayed: released (revision 2); P1 (released) re-assayed: released again, its
         chart points not doubled, its first certificate superseded; P2 retested in
         specification without an investigation: still held OOS; P3's microbiology: released;
         P4 has no data, but its microbiology is now overdue: decided again, held overdue
then     an authorised person invalidates P2's OOS result (investigation INV-T-1) and rejects P1
night 3  P2 retested: released; P1 (rejected) re-assayed: held, review required
"""

import datetime as dt
from dataclasses import replace

import numpy as np
import pytest
from sqlalchemy import text

from flows import nightly
from pipeline.demo import plant as demo
from pipeline.night.investigation import record_investigation
from pipeline.night.open import open_night
from pipeline.night.person_decision import decide_lot
from pipeline.records import signing
from pipeline.records.demo_trust import create_demo_trust
from pipeline.records.lot_record_store import certificate_status, load_histories
from pipeline.records.workspace import atomic_write, write_settings
from pipeline.vocabulary import ResultStatus
from tests.pg import database_of

pytestmark = pytest.mark.slow

DAY = dt.date(2026, 11, 24)


def _lots():
    rng = np.random.default_rng(7)
    lipase = demo._plan_lots(demo.LIPASE, 0, DAY, 4, rng)
    protease = demo._plan_lots(demo.PROTEASE, 0, DAY, 4, rng)
    protease[1] = replace(protease[1], vmax_u_per_mg=demo.PROTEASE.vmax_u_per_mg * 0.64)
    protease[2] = replace(protease[2], missing_tests=demo.MICRO)
    protease[3] = replace(protease[3], missing_tests=demo.MICRO, manufactured_on=DAY - dt.timedelta(days=5))
    return lipase, protease


def _files(date, lipase, protease, rng, *, lipase_recovery=1.0, lims=True, only_lims=()):
    """One night's exports: registry, activity plates, a protein plate, LIMS results (or only some tests)."""
    files = {f"lots-{date:%Y%m%d}.csv": demo._registry([*lipase, *protease, *only_lims], date)}
    if lipase:
        files.update(demo._activity_plate(f"AK-{date:%y%m%d}-L1", demo.LIPASE, lipase, rng, lipase_recovery))
    if protease:
        files.update(demo._activity_plate(f"AK-{date:%y%m%d}-P1", demo.PROTEASE, protease, rng, 1.0))
    if lipase or protease:
        files.update(demo._protein_plate(f"PR-{date:%y%m%d}-1", [*lipase, *protease], rng))
    for lot in [*lipase, *protease] if lims else []:
        name, data = demo._lims_file(lot, date, rng)
        files[name.replace(".csv", f"-{date:%Y%m%d}.csv")] = data
    for lot in only_lims:
        name, data = demo._lims_file(lot, date, rng, only=demo.MICRO)
        files[name.replace(".csv", f"-{date:%Y%m%d}.csv")] = data
    return files


def _night(root, files):
    for name, data in files.items():
        atomic_write(root / "inbox" / name, data)
    ws, store, signer = open_night(root)
    summary = nightly.run_stages(ws, store, signer, orchestrated=False)
    return {o.lot_id: (o.revision, o.label) for o in summary.outcomes}, ws, store


def night_workspace(root, database_url=None):
    """A workspace for the demo plant's nights (SQLite, or the database at ``database_url``)."""
    settings = {"plant_name": demo.PLANT_NAME, "time_zone": demo.PLANT_TIME_ZONE,
                "signing": {"signer_name": demo.DEMO_SIGNER}}
    if database_url:
        settings["database_url"] = database_url
    write_settings(root, settings)
    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()
    (root / "inbox").mkdir(exist_ok=True)
    return root


def _scenario(root, person, database_url=None):
    night_workspace(root, database_url)
    rng = np.random.default_rng(11)
    lipase, protease = _lots()
    l_ids, (p1, p2, p3, p4) = [lot.lot_id for lot in lipase], protease
    nights = []

    got, ws, store = _night(root, _files(DAY, lipase, protease, rng, lipase_recovery=0.82))
    nights.append(got)
    first_certificate = next(d.record.certificate.file for d in store.decisions(p1.lot_id))

    retest = replace(p2, vmax_u_per_mg=demo.PROTEASE.vmax_u_per_mg)
    got, ws, store = _night(root, _files(DAY + dt.timedelta(1), lipase, [p1, retest], rng, lims=False,
                                         only_lims=[p3]))
    nights.append(got)
    # the demo reviewer of the workspace's demo register (roles: release, rejection, result invalidation)
    p12, passphrase = create_demo_trust(ws.keys, demo.PLANT_NAME).identity_of(person)
    identity = signing.load_identity(p12, passphrase_file=passphrase)
    record_investigation(ws, store, p2.lot_id, test="specific_activity", outcome="invalidated", reference="INV-T-1",
                         reason="substrate stock at half strength (preparation record)",
                         retest_plan="re-assay on a fresh plate", identity=identity)
    decide_lot(ws, store, p1.lot_id, release=False, reason="customer complaint on a retained sample",
               identity=identity)

    got, ws, store = _night(root, _files(DAY + dt.timedelta(2), [], [p1, retest], rng, lims=False))
    nights.append(got)
    return nights, store, l_ids, (p1.lot_id, p2.lot_id, p3.lot_id, p4.lot_id), first_certificate


@pytest.fixture(scope="module")
def person():
    return "mira.castellan"  # in the demo register each workspace's demo trust set writes


@pytest.fixture(params=["sqlite", "postgresql"])
def database(request):
    yield from database_of(request.param, None)


def test_each_night_of_the_lot_record(database, person, tmp_path):
    nights, store, lipase, (p1, p2, p3, p4), first_certificate = _scenario(tmp_path / "w", person, database)
    assert nights[0] == {**{lot: (1, "held: invalid assay") for lot in lipase}, p1: (1, "ready for release"),
                         p2: (1, "held: out of specification"), p3: (1, "pending"), p4: (1, "pending")}
    assert nights[1] == {**{lot: (2, "ready for release") for lot in lipase}, p1: (2, "ready for release"),
                         p2: (2, "held: out of specification"), p3: (2, "ready for release"), p4: (2, "held: overdue")}
    assert nights[2] == {p1: (4, "held: review required"), p2: (3, "ready for release")}

    # P3: pending listed what was awaited, then its microbiology completed the record.
    first = store.decisions(p3)[0].record
    assert [r for r in first.reasons if r.startswith("awaiting")] == [
        "awaiting Total coliforms (expected by 2026-11-27)", "awaiting Escherichia coli (expected by 2026-11-27)",
        "awaiting Salmonella (expected by 2026-11-27)"]
    # P4 (made 2026-11-19, due 2026-11-24): pending on its due day, overdue the night after, without new data.
    overdue = store.decisions(p4)[-1].record
    assert overdue.reasons == tuple(f"{t}: no result; it was due by 2026-11-24, overdue since 2026-11-25"
                                    for t in ("Total coliforms", "Escherichia coli", "Salmonella"))
    assert overdue.input_files == {} and overdue.results[0].value is not None  # carried from the record
    history = load_histories(store, [p1, p2, p3, lipase[0]])
    # The invalid lipase results were superseded by the re-assay's valid results (new rows, not edits).
    activity = [r for r in history[lipase[0]].results if r.attribute == "activity"]
    assert [r.status for r in activity] == [ResultStatus.SUPERSEDED, ResultStatus.VALID]
    assert "superseded by the valid result of 2026-11-25" in activity[0].status_reason
    # P2: its OOS result was invalidated by the investigation; both retests are in the record, valid.
    specific = [r for r in history[p2].results if r.attribute == "specific_activity"]
    assert [r.status for r in specific] == [ResultStatus.INVALIDATED, ResultStatus.VALID, ResultStatus.VALID]
    assert specific[0].reference == "INV-T-1" and specific[0].verdict == "fail"
    # P3: earlier nights' plate results carried over; the LIMS result came from its own file.
    coliforms = [r for r in history[p3].results if r.attribute == "coliforms"]
    assert len(coliforms) == 1 and list(coliforms[0].files) == [f"lims-{p3}-20261125.csv"]
    assert coliforms[0].analyst == "K. Lindqvist"

    # P1: released, re-assayed, rejected, re-assayed: each trended attribute on its chart once.
    with store.engine.connect() as connection:
        counts = connection.execute(text("select attribute, count(*) from chart_points where lot_id = :lot "
                                         "group by attribute"), {"lot": p1}).all()
    assert counts and all(count == 1 for _, count in counts)
    # Its first certificate was superseded by revision 2, revision 2's by the rejection (revision 3).
    status = certificate_status(store, first_certificate)
    assert (status.status, status.revision, status.superseded_by_revision) == ("superseded", 1, 2)
    second = store.decisions(p1)[1].record.certificate.file
    assert (certificate_status(store, second).status, certificate_status(store, second).superseded_by_revision) == \
        ("superseded", 3)
    released_p2 = store.decisions(p2)[-1].record.certificate.file
    assert certificate_status(store, released_p2).status == "current"
    assert certificate_status(store, "NOPE_r1_certificate.pdf") is None


def test_replaying_the_nights_in_a_fresh_workspace_gives_identical_records(person, tmp_path):
    from tests.golden import capture

    _scenario(tmp_path / "a", person)
    _scenario(tmp_path / "b", person)
    first, second = capture(tmp_path / "a"), capture(tmp_path / "b")
    for table in ("lot_results", "investigations", "document_status", "chart_points", "results", "lots"):
        assert first[f"store/{table}.jsonl"] == second[f"store/{table}.jsonl"], table
    assert first["store/lot_results.jsonl"].count("\n") > 50
