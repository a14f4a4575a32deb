"""Sites sharing one results store (``store_shared: true``): each site's nights, LIMS files, desk,
status and people's acts keep to the site's own lots, and two sites' nights may run at once.

A lot belongs to the site whose nights decided it. Attacks: site B's night exporting site A's lots
(and the approvals A's reviewer signed) into B's LIMS folder; B's night deciding again A's pending
lot; A's reviewer approving, at A, a lot only B's workspace holds the documents of; two nights
exporting the same decisions at once (the database refused the second: a failed night); two
sites freezing one product's first chart limits at once. Checked against the store's own rows
(every decision exported once, in its own site's file) and the demo's simulated lots.
"""

from __future__ import annotations

import csv
import threading
from pathlib import Path

import pytest
from sqlalchemy import func, select

from flows import cli
from pipeline.demo import plant as demo
from pipeline.records.current import of_site
from pipeline.records.desk_queries import current_decisions
from pipeline.records.lot_record_store import pending_lots
from pipeline.records.store import Store
from pipeline.records.stored import LimitsWrite
from pipeline.records.tables import ControlLimitRow, DecisionRow, LimsExport
from pipeline.records.workspace import atomic_write, open_workspace, write_settings
from pipeline.records.workspace_id import workspace_id
from tests.cli import run_cli
from tests.pg import database_of, fresh_database

NIGHTS = demo.build_scenario(nights=3, lipase_per_night=3, protease_per_night=2)


@pytest.fixture(params=["sqlite", "postgresql"])
def url(request, tmp_path):
    yield from database_of(request.param, f"sqlite:///{tmp_path / 'shared.db'}")


def _site(root: Path, url: str, night) -> Path:
    root.mkdir()
    write_settings(root, {"plant_name": f"{demo.PLANT_NAME} — {root.name}", "database_url": url,
                          "store_shared": True, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    _deliver(root, night)
    return root


def _deliver(root: Path, night, skip: str = "") -> None:
    (root / "inbox").mkdir(exist_ok=True)
    for name, data in night.files.items():
        if not (skip and skip in name):
            atomic_write(root / "inbox" / name, data)


def _lims_lots(root: Path) -> list[tuple[str, str]]:
    """(lot, revision) of every row of every LIMS file of the site."""
    rows = []
    for path in sorted((root / "lims").glob("*.csv")):
        with path.open(encoding="utf-8", newline="") as handle:
            rows += [(row["lot_id"], row["revision"]) for row in csv.DictReader(handle)]
    return rows


def _night(root: Path) -> None:
    assert cli.main(["run", "--workspace", str(root), "--no-orchestration"]) == 0


def _approve_all(root: Path) -> int:
    from pipeline.records.demo_trust import create_demo_trust

    ws = open_workspace(root)
    p12, passphrase = create_demo_trust(ws.keys, ws.plant_name).identity_of(cli.DEMO_APPROVER)
    return cli.main(["approve", "--night", str(_last_night(root)), "--workspace", str(root), "--identity", str(p12),
                     "--passphrase-file", str(passphrase), "--reason", "night reviewed: results and assays valid"])


def _last_night(root: Path) -> int:
    from pipeline.records.desk_queries import latest_nights

    ws = open_workspace(root)
    return latest_nights(Store(ws.database_url), 1, ws.site_id())[0].id


def test_each_site_exports_reviews_and_counts_only_its_own_lots(url, tmp_path, capsys):
    a = _site(tmp_path / "site-a", url, NIGHTS[0])
    b = _site(tmp_path / "site-b", url, NIGHTS[1])
    store = Store(url)
    _night(a)
    lots_a = {d.lot_id for d in store.decisions()}
    assert _approve_all(a) == 0  # A's reviewer releases A's lots: new revisions, not yet in a LIMS file
    _night(b)
    lots_b = {d.lot_id for d in store.decisions()} - lots_a
    assert len(lots_a) == len(lots_b) == 5 and not lots_a & lots_b
    # B's LIMS holds B's lots, and none of the releases signed at site A
    assert {lot for lot, _ in _lims_lots(b)} == lots_b
    _deliver(a, NIGHTS[2])
    _night(a)
    exported_a = _lims_lots(a)
    assert {lot for lot, _ in exported_a} >= lots_a and not {lot for lot, _ in exported_a} & lots_b
    assert {lot for lot, revision in exported_a if revision == "2"} == lots_a  # A's releases, in A's LIMS
    with store.session() as s:  # every decision of the store in one LIMS file, once
        assert s.scalar(select(func.count(LimsExport.id))) == s.scalar(select(func.count(DecisionRow.id)))
    # each revision's results (a row per result) in one site's files: the store's revisions, split by site
    assert len(set(exported_a)) + len(set(_lims_lots(b))) == len(store.decisions())
    assert not set(exported_a) & set(_lims_lots(b))

    site_a, site_b = workspace_id(a), workspace_id(b)
    assert {d.lot_id for d in current_decisions(store, site_id=site_b)} == lots_b
    assert {d.lot_id for d in current_decisions(store, site_id=site_a)} >= lots_a
    assert {d.lot_id for d in current_decisions(store)} == {d.lot_id for d in store.decisions()}  # one site: all
    # B's reviewer cannot approve, at B, a lot of A: refused, nothing written
    before = len(store.decisions())
    ready_a = sorted({d.lot_id for d in current_decisions(store, site_id=site_a)
                      if d.disposition == "ready for release"})
    assert ready_a
    from pipeline.records.demo_trust import create_demo_trust

    ws_b = open_workspace(b)
    p12, passphrase = create_demo_trust(ws_b.keys, ws_b.plant_name).identity_of(cli.DEMO_APPROVER)
    capsys.readouterr()
    assert cli.main(["approve", ready_a[0], "--workspace", str(b), "--identity", str(p12), "--passphrase-file",
                     str(passphrase), "--reason", "results reviewed"]) == 2
    assert f"lot {ready_a[0]} belongs to another site sharing the results store" in capsys.readouterr().err
    assert len(store.decisions()) == before
    # B's morning at the desk and B's status name B's lots and nights only; a lot of A is not B's to open
    from flows.desk.views import lot_view, morning_view
    from pipeline.errors import InputError

    morning = morning_view(ws_b, store)
    shown = {line.lot_id for group in morning.groups for line in group.lots}
    assert shown == lots_b and dict(morning.decided_elsewhere).get("released", 0) == 0
    assert {n.id for n in morning.nights} == {d.record.night_id for d in store.decisions() if d.lot_id in lots_b}
    with pytest.raises(InputError, match="belongs to another site"):
        lot_view(ws_b, store, ready_a[0], ())
    capsys.readouterr()
    cli.main(["status", "--workspace", str(b), "--lots", "50"])
    status = capsys.readouterr().out
    assert all(lot in status for lot in lots_b) and not any(lot in status for lot in lots_a)


def test_a_pending_lot_is_its_own_sites_to_decide_again(url, tmp_path):
    """A lot waiting for its LIMS results at site A is on A's list of pending lots, never on B's."""
    a = _site(tmp_path / "site-a", url, NIGHTS[0])
    entries = (a / "inbox" / "lims-PGR-2611-002.csv").read_text(encoding="utf-8").splitlines()
    atomic_write(a / "inbox" / "lims-PGR-2611-002.csv",  # its microbiology comes days later
                 "\n".join(line for line in entries if ",COLI," not in line and ",ECOLI," not in line).encode() + b"\n")
    b = _site(tmp_path / "site-b", url, NIGHTS[1])
    _night(a)
    _night(b)
    store = Store(url)
    pending_a = pending_lots(store, workspace_id(a))
    assert [lot for lot, _, _ in pending_a] == ["PGR-2611-002"] and pending_lots(store, workspace_id(b)) == []
    assert {lot for lot, _, _ in pending_lots(store)} == {lot for lot, _, _ in pending_a}  # one site: all


def test_a_lot_of_nights_from_before_identities_belongs_to_every_site(tmp_path):
    store = Store(f"sqlite:///{tmp_path / 'old.db'}")
    night = store.start_night("test")  # no workspace identity: a night of before
    with store.session() as s:
        from pipeline.records.tables import Lot

        s.add(Lot(lot_id="LLC-0001", product_code="LLC-200", first_seen_utc=night_time()))
        s.flush()
        s.add(DecisionRow(lot_id="LLC-0001", revision=1, night_id=night, disposition="held", hold_categories=[],
                          reasons=[], spec_version="1", spec_sha256="0" * 64, fingerprint="f" * 64,
                          decided_by="lotgate 0.1", decided_at_utc=night_time(), record={}))
    with store.session() as s:
        for site in ("a" * 32, "b" * 32, None):
            assert s.scalars(select(DecisionRow.lot_id).where(of_site(DecisionRow.lot_id, site))).all() == ["LLC-0001"]


def night_time():
    import datetime as dt

    return dt.datetime(2026, 11, 20, tzinfo=dt.UTC)


def _first_limits(product: str) -> LimitsWrite:
    return LimitsWrite(product, "activity_u_per_ml", 100.0, 2.0, 2.2, ("L1", "L2"), "baseline reached",
                       "baseline of 2 released lots reached", ({"kind": "limits-frozen", "time_utc": "x"},),
                       first_only=True)


def test_a_charts_first_limits_are_frozen_once_whichever_site_comes_first(url):
    store = Store(url)
    store.add_decisions([], (_first_limits("LLC-200"),))
    store.add_decisions([], (_first_limits("LLC-200"),))  # the other site's night, a moment later: nothing
    assert [v.version for v in store.limit_versions("LLC-200", "activity_u_per_ml")] == [1]
    assert len(store.event_bodies("limits-frozen")) == 1
    # a person's new baseline is a new version as before
    store.freeze_limits("LLC-200", "activity_u_per_ml", 101.0, 2.0, 2.2, ["L1"], "A. Person", "rebaselined")
    assert [v.version for v in store.limit_versions("LLC-200", "activity_u_per_ml")] == [1, 2]


def test_two_sites_freezing_one_chart_at_once_wait_for_each_other():
    """PostgreSQL: site B's freeze waits while A's transaction holds the chart, then finds A's limits."""
    url, drop = fresh_database()
    try:
        first, second = Store(url), Store(url)
        first.add_decisions([], ())
        holding, done = threading.Event(), threading.Event()
        errors: list[BaseException] = []

        def site_a():
            try:
                with first.session() as s:
                    first._freeze(s, _first_limits("PGR-040"))
                    holding.set()
                    done.wait(2.0)  # B tries meanwhile
            except BaseException as exc:  # noqa: BLE001 - reported below
                errors.append(exc)

        worker = threading.Thread(target=site_a)
        worker.start()
        assert holding.wait(30)
        timer = threading.Timer(1.0, done.set)
        timer.start()
        second.add_decisions([], (_first_limits("PGR-040"),))  # waits for A's commit, then stores nothing
        worker.join(30)
        assert not errors, errors
        with second.session() as s:
            assert s.scalar(select(func.count(ControlLimitRow.id))) == 1
    finally:
        drop()


@pytest.mark.slow
def test_two_sites_nights_at_once_on_postgresql(tmp_path):
    """Two processes, one per site, at the same moment: both nights end, each LIMS file holds its site's lots."""
    url, drop = fresh_database()
    try:
        roots = [_site(tmp_path / name, url, night) for name, night in (("site-a", NIGHTS[0]), ("site-b", NIGHTS[1]))]
        finished: dict[str, object] = {}
        threads = [threading.Thread(target=lambda r=root: finished.__setitem__(
            r.name, run_cli(["run", "--workspace", r, "--no-orchestration"], timeout=300))) for root in roots]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(400)
        for name, done in finished.items():
            assert done.returncode == 0, f"{name}: {done.stdout[-2000:]}{done.stderr[-2000:]}"
        store = Store(url)
        by_night = {}
        for d in store.decisions():
            by_night.setdefault(d.record.night_id, set()).add(d.lot_id)
        assert len(by_night) == 2 and sum(map(len, by_night.values())) == 10
        exported = [{lot for lot, _ in _lims_lots(root)} for root in roots]
        assert sorted(map(sorted, exported)) == sorted(map(sorted, by_night.values()))
    finally:
        drop()
