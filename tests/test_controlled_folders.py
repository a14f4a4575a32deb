"""Which controlled folders a night reads: the workspace's setting, else the environment, else shipped.

Check values are the shipped documents themselves (specs/products/LLC-200.yaml is version "3.1";
specs/methods/ holds five methods, schemas/ six export layouts) and copies of them changed here.
"""

import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from flows.trend_cmd import _attribute
from pipeline.demo import plant as demo
from pipeline.errors import NotFound, SpecificationError
from pipeline.records.controlled_files import (
    controlled_folders,
    load_catalog,
    open_controlled_documents,
    shipped_folders,
)
from pipeline.records.workspace import atomic_write, open_workspace, write_settings

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(autouse=True)
def _no_environment_folders(monkeypatch):
    monkeypatch.delenv("LOTGATE_SPECS_DIR", raising=False)
    monkeypatch.delenv("LOTGATE_SCHEMAS_DIR", raising=False)


def _plant_specifications(root: Path, version: str) -> Path:
    """A copy of the shipped product specifications with LLC-200 at another version."""
    folder = root / "plant-specs"
    shutil.copytree(REPO / "specs" / "products", folder)
    path = folder / "LLC-200.yaml"
    path.write_text(path.read_text(encoding="utf-8").replace('version: "3.1"', f'version: "{version}"'),
                    encoding="utf-8")
    return folder


def test_a_source_checkout_uses_its_top_level_folders():
    folders = shipped_folders()
    assert folders.specifications == REPO / "specs" / "products"
    assert folders.methods == REPO / "specs" / "methods"
    assert folders.layouts == REPO / "schemas"
    assert controlled_folders() == folders


def test_the_workspace_setting_comes_before_the_environment(tmp_path, monkeypatch):
    _plant_specifications(tmp_path, "3.1-P2")
    environment = tmp_path / "from-environment"
    shutil.copytree(REPO / "specs", environment)
    monkeypatch.setenv("LOTGATE_SPECS_DIR", str(environment))
    monkeypatch.setenv("LOTGATE_SCHEMAS_DIR", str(REPO / "schemas"))
    write_settings(tmp_path, {"controlled": {"specifications": "plant-specs"}})
    folders = controlled_folders(open_workspace(tmp_path))
    assert folders.specifications == tmp_path / "plant-specs"  # the setting, relative to the workspace
    assert folders.methods == environment / "methods"  # not named in the setting: the environment
    assert folders.layouts == REPO / "schemas"
    catalog, layouts = open_controlled_documents(open_workspace(tmp_path))
    # specs/products also holds LLC-200 3.2 (effective 2026-11-26): 3.1-P2 is the version in force before it
    assert catalog.specification_on("LLC-200", "2026-11-25").document.version == "3.1-P2"
    assert catalog.specification_on("PGR-040", "2026-11-25").document.version != "3.1-P2"
    assert sorted(catalog.methods) == ["LIP-PNPB", "PROT-A280", "PROT-DYE595", "PROT-FL485", "PRT-SAAPF"]
    assert len(layouts) == 6


def test_the_environment_comes_before_the_shipped_folders(tmp_path, monkeypatch):
    shutil.copytree(REPO / "specs", tmp_path / "specs")
    (tmp_path / "specs" / "products" / "PGR-040.yaml").unlink()
    monkeypatch.setenv("LOTGATE_SPECS_DIR", str(tmp_path / "specs"))
    assert sorted(load_catalog().specifications) == ["LLC-200"]


def test_a_missing_folder_is_refused_when_the_workspace_opens(tmp_path):
    write_settings(tmp_path, {"controlled": {"methods": "qc/methods"}})
    with pytest.raises(SpecificationError) as refused:
        open_workspace(tmp_path)
    message = str(refused.value)
    assert "assay methods" in message and "controlled.methods: qc/methods" in message
    assert str(tmp_path / "qc" / "methods") in message and "does not exist" in message


@pytest.mark.parametrize(("setting", "phrase"), [
    ({"products": "specs"}, "allowed: specifications, methods, layouts"),
    ({"layouts": 3}, "'controlled.layouts' must be a folder name"),
    (["specs"], "'controlled' must be a mapping of specifications, methods, layouts to folders"),
])
def test_a_malformed_setting_is_refused(tmp_path, setting, phrase):
    write_settings(tmp_path, {"controlled": setting})
    with pytest.raises(SpecificationError, match="workspace.yaml") as refused:
        open_workspace(tmp_path)
    assert phrase in str(refused.value)


def test_the_trend_command_reads_the_workspace_specifications(tmp_path):
    folder = _plant_specifications(tmp_path, "3.1-P2")
    (folder / "LLC-200.yaml").rename(folder / "LLC-300.yaml")
    text = (folder / "LLC-300.yaml").read_text(encoding="utf-8")
    (folder / "LLC-300.yaml").write_text(text.replace("product_code: LLC-200", "product_code: LLC-300"),
                                         encoding="utf-8")
    write_settings(tmp_path, {"controlled": {"specifications": str(folder)}})
    spec, attribute = _attribute("LLC-300", "specific_activity", str(tmp_path))
    assert (spec.document.version, attribute.code) == ("3.1-P2", "specific_activity")
    with pytest.raises(NotFound, match="unknown product 'LLC-300'"):
        _attribute("LLC-300", "specific_activity", str(tmp_path / "elsewhere"))


@pytest.mark.slow
def test_a_night_decides_under_the_workspace_specifications(tmp_path):
    _plant_specifications(tmp_path, "3.1-P2")
    write_settings(tmp_path, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER},
                              "controlled": {"specifications": "plant-specs"}})
    (tmp_path / "keys").mkdir()
    (tmp_path / "keys" / "use-demo-identity").touch()
    for name, data in demo.build_scenario(nights=1)[0].files.items():
        atomic_write(tmp_path / "inbox" / name, data)
    done = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(tmp_path),
                           "--no-orchestration"], capture_output=True, text=True, timeout=600, cwd=REPO)
    assert done.returncode == 0, done.stderr[-2000:]
    with sqlite3.connect(tmp_path / "lotgate.db") as db:
        versions = dict(db.execute("select lots.product_code, group_concat(distinct spec_version) from decisions "
                                   "join lots using (lot_id) group by lots.product_code"))
    assert versions == {"LLC-200": "3.1-P2", "PGR-040": "1.4"}


def test_the_night_stops_on_a_missing_folder_before_reading_the_inbox(tmp_path):
    write_settings(tmp_path, {"controlled": {"layouts": "qc/layouts"}})
    atomic_write(tmp_path / "inbox" / "lots-20261124.csv", b"lot_id\n")
    done = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(tmp_path),
                           "--no-orchestration"], capture_output=True, text=True, timeout=300, cwd=REPO)
    assert done.returncode == 2, done.stdout + done.stderr
    assert "the folder of export layouts (controlled.layouts: qc/layouts) does not exist" in done.stderr
    assert (tmp_path / "inbox" / "lots-20261124.csv").exists()
    assert not (tmp_path / "quarantine").exists()
