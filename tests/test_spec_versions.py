"""Several versions of a specification or method on file: the one in force on the lot's date decides.

Check values are the shipped documents themselves: specs/products/LLC-200.yaml is version 3.1
(effective 2026-06-01, lead ≤ 5 mg/kg) and specs/products/LLC-200-v3.2.yaml version 3.2
(effective 2026-11-26, lead ≤ 2 mg/kg); their SHA-256 is computed here from the files' bytes.
The rule "the version with the latest effective date on or before the day is in force" is
common practice of document control (a document applies from its effective date on).
"""

import datetime as dt
import hashlib
import shutil
from pathlib import Path

import pytest

from pipeline.controlled.catalog import Catalog
from pipeline.errors import SpecificationError
from pipeline.records.controlled_files import (
    load_catalog,
    open_controlled_documents,
    shipped_folders,
)
from pipeline.records.workspace import open_workspace, write_settings
from pipeline.release.decision import decide_night
from pipeline.release.lot_evaluation import LimsEntry, LotInputs, evaluate_lots
from pipeline.vocabulary import SpecificationDate, Verdict

REPO = Path(__file__).resolve().parents[1]
PRODUCTS = REPO / "specs" / "products"
SHA_31 = hashlib.sha256((PRODUCTS / "LLC-200.yaml").read_bytes()).hexdigest()
SHA_32 = hashlib.sha256((PRODUCTS / "LLC-200-v3.2.yaml").read_bytes()).hexdigest()


@pytest.fixture(autouse=True)
def _no_environment_folders(monkeypatch):
    monkeypatch.delenv("LOTGATE_SPECS_DIR", raising=False)
    monkeypatch.delenv("LOTGATE_SCHEMAS_DIR", raising=False)


def _lot(assay: str, made: str, lead: str = "3.0") -> LotInputs:
    """A lot of LLC-200 with only its lead result in (3.0 mg/kg: within 3.1's limit of 5, above 3.2's of 2)."""
    return LotInputs(f"LLC-T-{assay.replace('-', '')}", "LLC-200", made, assay, None, None,
                     {"PB": LimsEntry(lead, "mg/kg", "lims-t.csv")}, {"lims-t.csv": "0" * 64})


@pytest.mark.parametrize(("assay", "version", "sha", "lead"), [
    ("2026-11-25", "3.1", SHA_31, Verdict.PASS),  # the day before 3.2's effective date
    ("2026-11-26", "3.2", SHA_32, Verdict.FAIL),  # the effective date itself
    ("2026-06-01", "3.1", SHA_31, Verdict.PASS),  # 3.1's own effective date
])
def test_the_version_in_force_on_the_assay_date_decides_and_is_recorded(assay, version, sha, lead):
    catalog = load_catalog()
    (evaluation,) = evaluate_lots([_lot(assay, "2026-05-01")], catalog)
    assert evaluation.verdict("lead").verdict == lead
    assert evaluation.verdict("lead").limit_text == ("≤ 5.0" if version == "3.1" else "≤ 2.0")
    assert not any("effective from" in reason for reason in evaluation.incomplete)
    (decided,) = decide_night([evaluation], catalog, {}, "test").lots
    assert (decided.decision.spec_version, decided.decision.spec_sha256) == (version, sha)


def test_the_plant_may_choose_the_date_of_manufacture(tmp_path):
    write_settings(tmp_path, {"specification_date": "manufacture"})
    catalog, _ = open_controlled_documents(open_workspace(tmp_path))
    assert catalog.specification_date == SpecificationDate.MANUFACTURE
    made_before, made_on = _lot("2026-11-27", "2026-11-25"), _lot("2026-11-28", "2026-11-26")
    before, on = evaluate_lots([made_before, made_on], catalog)
    assert (before.verdict("lead").verdict, on.verdict("lead").verdict) == (Verdict.PASS, Verdict.FAIL)
    # by assay date (the default) both would be judged by 3.2
    assert {e.verdict("lead").verdict for e in evaluate_lots([made_before, made_on], load_catalog())} == {Verdict.FAIL}


def test_an_unknown_setting_for_the_date_is_refused(tmp_path):
    write_settings(tmp_path, {"specification_date": "release"})
    with pytest.raises(SpecificationError, match="specification_date"):
        open_workspace(tmp_path)


def test_a_lot_dated_before_every_version_is_held_incomplete_with_the_reason():
    (evaluation,) = evaluate_lots([_lot("2026-05-31", "2026-05-30")], load_catalog())
    assert any("v3.1 is effective from 2026-06-01; the lot was assayed on 2026-05-31, before any version"
               in reason for reason in evaluation.incomplete)


def _copy_products(tmp_path: Path) -> Path:
    folder = tmp_path / "products"
    shutil.copytree(PRODUCTS, folder)
    return folder


def _catalog(products: Path) -> Catalog:
    folders = shipped_folders()
    return load_catalog(type(folders)(specifications=products, methods=folders.methods, layouts=folders.layouts))


def test_a_version_effective_in_the_future_is_staged_not_an_error(tmp_path):
    products = _copy_products(tmp_path)
    text = (products / "LLC-200-v3.2.yaml").read_text(encoding="utf-8")
    (products / "LLC-200-v4.0.yaml").write_text(
        text.replace('version: "3.2"', 'version: "4.0"').replace("effective_from: 2026-11-26",
                                                                 "effective_from: 2099-01-01"), encoding="utf-8")
    catalog = _catalog(products)
    assert [s.document.version for s in catalog.all_specifications("LLC-200")] == ["3.1", "3.2", "4.0"]
    assert catalog.specification_on("LLC-200", "2098-12-31").document.version == "3.2"
    assert catalog.specification_on("LLC-200", "2099-01-01").document.version == "4.0"
    assert [s.document.version for s in catalog.staged(dt.date(2026, 12, 1))] == ["4.0"]


@pytest.mark.parametrize(("change", "message"), [
    (lambda t: t.replace('version: "3.2"', 'version: "3.3"').replace("2026-11-26", "2026-06-01"),
     r"version 3\.[13] takes effect on 2026-06-01, the same day as version 3\.[13] in"),
    (lambda t: t.replace("2026-11-26", "2026-12-15").replace("max: 2,", "max: 1,"),
     "version 3.2 is also in"),
    (lambda t: t, "is the same file as"),
])
def test_ambiguous_versions_are_refused_naming_both_files(tmp_path, change, message):
    products = _copy_products(tmp_path)
    text = (products / "LLC-200-v3.2.yaml").read_text(encoding="utf-8")
    (products / "LLC-200-other.yaml").write_text(change(text), encoding="utf-8")
    with pytest.raises(SpecificationError, match=message) as refused:
        _catalog(products)
    line = str(refused.value)
    assert "\n" not in line
    assert "LLC-200-other.yaml" in line and ("LLC-200.yaml" in line or "LLC-200-v3.2.yaml" in line)


def test_two_versions_of_a_method_on_one_day_are_refused(tmp_path):
    folders = shipped_folders()
    methods = tmp_path / "methods"
    shutil.copytree(folders.methods, methods)
    text = (methods / "LIP-PNPB.yaml").read_text(encoding="utf-8")
    (methods / "LIP-PNPB-1.4.yaml").write_text(text.replace('version: "1.3"', 'version: "1.4"'), encoding="utf-8")
    with pytest.raises(SpecificationError, match=r"LIP-PNPB.yaml: method 'LIP-PNPB' version 1.3 takes effect on "
                                                 r"2026-01-15, the same day as version 1.4 in .*LIP-PNPB-1.4.yaml"):
        load_catalog(type(folders)(specifications=folders.specifications, methods=methods, layouts=folders.layouts))
    (methods / "LIP-PNPB-1.4.yaml").write_text(
        text.replace('version: "1.3"', 'version: "1.4"').replace("2026-01-15", "2026-12-01"), encoding="utf-8")
    catalog = load_catalog(type(folders)(specifications=folders.specifications, methods=methods,
                                         layouts=folders.layouts))
    assert catalog.method_on("LIP-PNPB", "2026-11-30").document.version == "1.3"
    assert catalog.method_on("LIP-PNPB", "2026-12-01").document.version == "1.4"
    assert catalog.method_on("LIP-PNPB", "2026-01-14") is None  # before the first version


@pytest.mark.slow
def test_the_night_stops_in_one_line_on_two_versions_effective_the_same_day(tmp_path):
    """The attack: a second file of LLC-200 dated like the first; which limits apply that day would be a guess."""
    import subprocess
    import sys
    products = _copy_products(tmp_path)
    text = (products / "LLC-200-v3.2.yaml").read_text(encoding="utf-8")
    (products / "LLC-200-v3.3.yaml").write_text(text.replace('version: "3.2"', 'version: "3.3"'), encoding="utf-8")
    write_settings(tmp_path, {"controlled": {"specifications": "products"}})
    (tmp_path / "keys").mkdir()
    (tmp_path / "keys" / "use-demo-identity").touch()
    (tmp_path / "inbox").mkdir()
    (tmp_path / "inbox" / "lots-20261124.csv").write_bytes(b"lot_id\n")
    done = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(tmp_path)],
                          capture_output=True, text=True, timeout=300, cwd=REPO)
    assert done.returncode == 2, done.stdout + done.stderr
    assert "Traceback" not in done.stderr and done.stderr.count("\n") == 1, done.stderr
    assert "version 3.3 takes effect on 2026-11-26, the same day as version 3.2" in done.stderr
    assert "LLC-200-v3.2.yaml" in done.stderr and "LLC-200-v3.3.yaml" in done.stderr
    assert (tmp_path / "inbox" / "lots-20261124.csv").exists() and not (tmp_path / "lotgate.db").exists()


def test_the_night_notes_each_staged_version():
    notes = load_catalog().staged_notes([("2026-11-23", "2026-11-25"), ("2026-11-22", "2026-11-24")])
    assert notes == [
        "specification LLC-200 v3.2 is on file and takes effect on 2026-11-26: staged, not used tonight (tonight's "
        "lots were assayed up to 2026-11-25)",
        "method PROT-FL485 v1.1 is on file and takes effect on 2026-12-01: staged, not used tonight (tonight's lots "
        "were assayed up to 2026-11-25)"]
    assert load_catalog().staged_notes([("2026-11-25", "2026-11-26")]) == [notes[1].replace("11-25)", "11-26)")]
