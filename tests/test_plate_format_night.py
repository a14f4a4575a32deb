"""A night whose plate reads are of a format the method does not declare: the reads are quarantined.

The demo plant's first night (96-well plates, a simulation) is run against a copy of the shipped
methods in which LIP-PNPB declares 384-well plates only. Each lipase read must be set aside with
its reason beside it and in the store, and the lipase lots held, naming the quarantined read;
the protease lots, whose method declares 96-well plates, are decided as usual.
"""

import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline.demo import plant as demo
from pipeline.records.controlled_files import shipped_folders
from pipeline.records.workspace import atomic_write, write_settings

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_reads_of_an_undeclared_plate_format_are_quarantined_and_their_lots_held(tmp_path, monkeypatch):
    monkeypatch.delenv("LOTGATE_SPECS_DIR", raising=False)
    methods = tmp_path / "plant-methods"
    shutil.copytree(shipped_folders().methods, methods)
    path = methods / "LIP-PNPB.yaml"
    text = path.read_text(encoding="utf-8")
    only_384 = "\n".join(line for line in text.splitlines() if "{wells: 96," not in line) + "\n"
    assert only_384 != text
    path.write_text(only_384, encoding="utf-8")
    write_settings(tmp_path, {"plant_name": demo.PLANT_NAME, "signing": {"signer_name": demo.DEMO_SIGNER},
                              "controlled": {"methods": "plant-methods"}})
    (tmp_path / "keys").mkdir()
    (tmp_path / "keys" / "use-demo-identity").touch()
    night = demo.build_scenario(nights=1)[0]
    for name, data in night.files.items():
        atomic_write(tmp_path / "inbox" / name, data)
    done = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(tmp_path),
                           "--no-orchestration"], capture_output=True, text=True, timeout=600, cwd=REPO)
    assert done.returncode == 0, done.stderr[-2000:]
    lipase_reads = sorted(n for n in night.files if n.startswith("kinread-AK-") and "-L" in n)
    assert lipase_reads
    for name in lipase_reads:
        reason = (tmp_path / "quarantine" / f"{name}.reason.txt").read_text(encoding="utf-8")
        assert "its plate map says 96-well plate, and method LIP-PNPB v1.3 declares settings for 384-well plates" \
            in reason
        assert not (tmp_path / "inbox" / name).exists()
    with sqlite3.connect(tmp_path / "lotgate.db") as db:
        stored = dict(db.execute("select file_name, status from input_files where file_name like 'kinread-%'"))
        decided = {lot: (product, disposition, reasons) for lot, product, disposition, reasons in db.execute(
            "select lot_id, lots.product_code, disposition, reasons from decisions join lots using (lot_id)")}
    assert all(stored[name] == "quarantined" for name in lipase_reads)
    lipase = {lot: d for lot, d in decided.items() if d[0] == "LLC-200"}
    protease = {lot: d for lot, d in decided.items() if d[0] == "PGR-040"}
    assert lipase and {d[1] for d in lipase.values()} == {"held"}
    assert all("declares settings for 384-well plates only" in reasons for _, _, reasons in lipase.values())
    # the protease plates are untouched (the single demo night also carries its deliberate OOS and bad LIMS file)
    assert protease and not any("kinread-" in reasons for _, _, reasons in protease.values())
    assert sum(d[1] == "ready for release" for d in protease.values()) >= 3
