"""A lot whose activity plate alone is assayed again gets its derived results from the protein on record.

The demo's trouble night puts four lipase lots on an activity plate whose reference standard
fails (invalid assay), on a valid protein plate. The lab repeats the activity plate alone, two
days later. The lots' specific activity, Vmax per mg, kcat and kcat/Km then come from tonight's
activity and the protein on record, re-read from the archive. Checked against the formulas:
specific activity = activity / protein, its relative SE combined in quadrature (GUM, JCGM
100:2008, 5.1.2 and 5.1.6, for a quotient of uncorrelated inputs), and kcat = Vmax[U/mg]·MW/60/1000
(the unit definition: 1 U = 1 µmol/min; common practice). Attacks: the protein recorded a second
time, an archived file changed since it was received, an OOS protein used for a derived result.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import stat
from pathlib import Path

import pytest

from flows import cli
from pipeline.assay.method_kinds import Measures
from pipeline.demo import plant as demo
from pipeline.records.controlled_files import open_controlled_documents
from pipeline.records.lot_record_store import load_histories
from pipeline.records.store import Store
from pipeline.records.workspace import atomic_write, write_settings
from pipeline.release.carried import CarriedPlate, needs_other_plate, plate_to_carry
from pipeline.release.lot_record import Investigation, LotHistory, LotResult
from pipeline.vocabulary import InvestigationOutcome, ResultStatus, Verdict

FIRST = demo.build_scenario(nights=1, lipase_per_night=8, protease_per_night=4)[0]
INVALID = ("LLC-2611-005", "LLC-2611-006", "LLC-2611-007", "LLC-2611-008")


def _repeat_activity_only(assay_date: dt.date) -> dict[str, bytes]:
    """The lots of the invalid plate on a new activity plate, with their registry line; no protein, no LIMS."""
    again = demo.build_reassay(FIRST, INVALID, assay_date)
    return {name: data for name, data in again.files.items() if name.startswith(("lots-", "platemap-AK", "kinread-AK"))}


def _workspace(root: Path) -> Path:
    root.mkdir()
    write_settings(root, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER}})
    (root / "keys").mkdir()
    (root / "keys" / "use-demo-identity").touch()
    return root


def _night(root: Path, files: dict[str, bytes]) -> None:
    (root / "inbox").mkdir(exist_ok=True)
    for name, data in files.items():
        atomic_write(root / "inbox" / name, data)
    assert cli.main(["run", "--workspace", str(root), "--no-orchestration"]) == 0


def _results(store: Store, lot: str, attribute: str) -> list[LotResult]:
    return [r for r in load_histories(store, [lot])[lot].results if r.attribute == attribute]


@pytest.fixture(scope="module")
def two_nights(tmp_path_factory):
    root = _workspace(tmp_path_factory.mktemp("reread") / "plant")
    _night(root, FIRST.files)
    _night(root, _repeat_activity_only(FIRST.assay_date + dt.timedelta(days=2)))
    return root, Store(f"sqlite:///{root / 'lotgate.db'}")


def test_the_repeated_activity_plate_alone_releases_the_lots(two_nights):
    _root, store = two_nights
    for lot in INVALID:
        history = store.decisions(lot)
        assert [d.disposition for d in history] == ["held", "ready for release"], (lot, history[-1].record.reasons)
        assert "invalid assay" in history[0].record.hold_categories


def test_the_protein_on_record_is_used_and_not_recorded_again(two_nights):
    _root, store = two_nights
    for lot in INVALID:
        [protein] = _results(store, lot, "protein")  # one protein result: night 1's
        activity = _results(store, lot, "activity")
        assert [r.status for r in activity] == [ResultStatus.SUPERSEDED, ResultStatus.VALID]
        specific = _results(store, lot, "specific_activity")
        assert len(specific) == 2 and specific[-1].status == ResultStatus.VALID
        a, p, s = activity[-1], protein, specific[-1]
        # the quotient and its relative SE in quadrature (GUM 5.1.6, uncorrelated inputs)
        assert s.value == pytest.approx(a.value / p.value, rel=1e-12)
        assert s.se / s.value == pytest.approx(math.hypot(a.se / a.value, p.se / p.value), rel=1e-9)
        # where it came from: tonight's activity plate and night 1's protein plate, with both plates' files
        assert "AK-" in s.source and p.plate_id in s.source
        assert set(p.files) <= set(s.files) and any(name.startswith("kinread-AK") for name in s.files)
        assert a.night_id == s.night_id != p.night_id
        # kcat from Vmax per mg (1 U = 1 µmol/min; common practice): kcat = Vmax·MW/60/1000
        vmax, kcat = _results(store, lot, "vmax")[-1], _results(store, lot, "kcat")[-1]
        assert vmax.status == kcat.status == ResultStatus.VALID
        weight = SPEC.molecular_weight_g_per_mol  # LLC-200's, from its specification
        assert kcat.value == pytest.approx(vmax.value * weight / 60 / 1000, rel=1e-12)


def test_the_report_names_the_plate_read_again(two_nights):
    root, store = two_nights
    latest = store.decisions(INVALID[0])[-1].record
    protein_files = {name for name in latest.input_files if name.startswith(("platemap-PR", "protread-PR"))}
    assert protein_files  # the decision names the archived protein files it used
    dossier = (root / "reports" / f"{INVALID[0]}_r2_dossier.json").read_text(encoding="utf-8")
    assert '"from_the_lot_record": "night 1 (assayed 2026-11-24), read again from the archive"' in dossier


def test_the_desk_says_which_plate_came_from_the_lot_record(two_nights):
    import re
    import warnings

    from flows.desk.accounts import Desk, create_account
    from flows.desk.app import create_app
    from flows.desk.roles import DeskRole
    from flows.desk.settings import DeskSettings
    from pipeline.records.workspace import open_workspace

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from starlette.testclient import TestClient

    root, store = two_nights
    ws = open_workspace(root)
    create_account(ws, store, "viewer", DeskRole.VIEWER, "viewer password 2026", by="test administrator")
    client = TestClient(create_app(Desk(ws, store, DeskSettings())), base_url="https://testserver")
    token = re.search(r'name="csrf" value="([^"]+)"', client.get("/login").text).group(1)
    client.post("/login", data={"csrf": token, "name": "viewer", "password": "viewer password 2026"})
    page = client.get(f"/lot?id={INVALID[0]}").text
    assert "PR-261124-1" in page
    assert "from the lot record: night 1 (assayed 2026-11-24), read again from the archive" in page


def test_an_archived_file_changed_since_it_was_received_is_not_used(tmp_path):
    root = _workspace(tmp_path / "plant")
    _night(root, FIRST.files)
    [read] = list((root / "archive").rglob("protread-PR-*"))
    os.chmod(read, stat.S_IWUSR | stat.S_IRUSR)
    read.write_bytes(read.read_bytes().replace(b"0.", b"1.", 1))
    _night(root, _repeat_activity_only(FIRST.assay_date + dt.timedelta(days=2)))
    store = Store(f"sqlite:///{root / 'lotgate.db'}")
    for lot in INVALID:
        latest = store.decisions(lot)[-1]
        assert latest.disposition == "held"
        assert any("no longer has the SHA-256 recorded" in r for r in latest.record.reasons), latest.record.reasons
        assert len(_results(store, lot, "protein")) == 1


def test_an_archived_file_replaced_by_a_link_is_not_followed(tmp_path):
    """Same bytes, but a link out of the archive: not read (a link could be re-pointed at any time)."""
    root = _workspace(tmp_path / "plant")
    _night(root, FIRST.files)
    [read] = list((root / "archive").rglob("protread-PR-*"))
    outside = tmp_path / "elsewhere.csv"
    outside.write_bytes(read.read_bytes())
    os.chmod(read.parent, 0o755)
    read.unlink()
    read.symlink_to(outside)
    _night(root, _repeat_activity_only(FIRST.assay_date + dt.timedelta(days=2)))
    latest = Store(f"sqlite:///{root / 'lotgate.db'}").decisions(INVALID[0])[-1]
    assert latest.disposition == "held"
    assert any("not a file of this workspace's archive" in r for r in latest.record.reasons), latest.record.reasons


# --- which plate a lot's record offers (pure) ---------------------------------------------------

CATALOG, _LAYOUTS = open_controlled_documents()
SPEC = CATALOG.specification_for_lot("LLC-200", "2026-11-20", "2026-11-24")  # protein 4.00–8.00 mg/mL


def _protein(verdict: Verdict, status: ResultStatus = ResultStatus.VALID, result_id: int = 7) -> LotResult:
    return LotResult("protein", status, verdict, 5.2 if verdict != Verdict.FAIL else 9.1, "5.20", "mg/mL", 0.05,
                     "2026-11-24", "plate PR-1", "PROT v1", {"platemap-PR-1.csv": "a" * 64}, plate_id="PR-1",
                     night_id=1, result_id=result_id)


def test_only_a_reportable_protein_is_offered():
    assert needs_other_plate(SPEC, {Measures.ACTIVITY}) == Measures.PROTEIN
    assert needs_other_plate(SPEC, {Measures.ACTIVITY, Measures.PROTEIN}) is None
    assert needs_other_plate(SPEC, set()) is None
    offered = plate_to_carry("L1", SPEC, Measures.PROTEIN, LotHistory((_protein(Verdict.PASS),)))
    assert isinstance(offered, CarriedPlate) and (offered.plate_id, offered.night_id, offered.recorded_value) == \
        ("PR-1", 1, 5.2)
    assert plate_to_carry("L1", SPEC, Measures.PROTEIN, LotHistory()) is None
    invalid = _protein(Verdict.INVALID, ResultStatus.INVALID)
    assert plate_to_carry("L1", SPEC, Measures.PROTEIN, LotHistory((invalid,))) is None
    standing = plate_to_carry("L1", SPEC, Measures.PROTEIN, LotHistory((_protein(Verdict.FAIL),)))
    assert isinstance(standing, str) and "out-of-specification result stands" in standing
    confirmed = Investigation("protein", 7, InvestigationOutcome.CONFIRMED_OOS, "INV-1", "r", "none", "A. Person",
                              "2026-11-25T08:00:00+00:00")
    assert isinstance(plate_to_carry("L1", SPEC, Measures.PROTEIN,
                                     LotHistory((_protein(Verdict.FAIL),), (confirmed,))), str)
