"""``lotgate trend`` and ``lotgate rebaseline``: what they print, write, store and log.

Small workspaces are built directly in a store with invented lots; the slow tests run the demo
once for the module (``lotgate demo``, about 25 s) and read its charts.
Reference limits are worked by hand with d₂ = 1.128 and D₄ = 3.267 (ASTM Manual on
Presentation of Data and Control Chart Analysis, MNL 7, factor tables).
"""

from __future__ import annotations

import argparse
import json
import shutil
from pathlib import Path

import pytest

from flows.trend_cmd import add_commands, cmd_rebaseline, cmd_trend
from pipeline.records import audit, ledger
from pipeline.records.chart_queries import active_limits
from pipeline.records.store import Store
from pipeline.records.stored import DecisionWrite
from pipeline.release.records import DecisionRecord, RecordedResult, TrendFinding
from tests.cli import run_cli

REPO = Path(__file__).resolve().parents[1]
PRODUCT, ATTR = "LLC-200", "specific_activity"  # a charted attribute of specs/products/LLC-200.yaml
# Invented lots: the hand-worked series 200, 204, 202, 206, 204 (see test_trend_prints_...).
VALUES = (200.0, 204.0, 202.0, 206.0, 204.0)


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="lotgate")
    add_commands(p.add_subparsers(dest="command", required=True))
    return p


def run(argv: list[str]) -> int:
    args = parser().parse_args(argv)
    return args.func(args)


def add_lot(store: Store, lot: str, value: float | None, *, held: tuple[str, ...] = (),
            trend_signals: tuple[str, ...] = ()) -> None:
    label = "released" if not held else f"held: {', '.join(held)}"
    record = DecisionRecord(
        lot, PRODUCT, "held" if held else "released", held, trend_signals, "3.1", "0" * 64, f"{lot:0>64}"[-64:],
        label, results=(RecordedResult(ATTR, value, None, "U/mg", "pass" if value is not None else "invalid"),),
        trend=(TrendFinding(ATTR, "out of trend" if trend_signals else "in trend", signals=trend_signals),))
    store.add_decisions([DecisionWrite(record, "test fixture",
                                       chart_values={} if held or value is None else {ATTR: value})])


def workspace(root: Path, values=VALUES, freeze: bool = True) -> Path:
    from pipeline.records.demo_trust import create_demo_trust

    (root / "keys").mkdir(parents=True, exist_ok=True)
    (root / "keys" / "use-demo-identity").touch()  # the demo trust set: anchor, register, reviewers
    create_demo_trust(root / "keys", "Trend test plant")
    store = Store(f"sqlite:///{root / 'lotgate.db'}")
    lots = [f"T-{i + 1:03d}" for i in range(len(values))]
    for lot, value in zip(lots, values):
        add_lot(store, lot, value)
    if freeze:
        # v1 from the hand-worked series: centre 203.2, MR-bar 3.0, sigma 3.0/1.128
        event = audit.event("limits-frozen", time_zone="Europe/Berlin", product=PRODUCT, attribute=ATTR)
        store.freeze_limits(PRODUCT, ATTR, 203.2, 3.0 / 1.128, 3.0, lots, frozen_by="lotgate (baseline reached)",
                            reason="baseline of 5 released lots reached", events=[event])
        audit.sync_log(store, root / "decisions.jsonl")
    return root


def signed_by(ws: Path, person: str = "mira.castellan") -> list[str]:
    """The arguments naming a demo reviewer's own identity (Mira holds 're-baseline', Jonas does not)."""
    folder = ws / "keys" / "people" / person
    return ["--identity", str(folder / "signer.p12"), "--passphrase-file", str(folder / "signer.passphrase")]


REASON = "resin change at the supplier"
MIRA = "Mira Castellan (DEMO)"


# --------------------------------------------------------------------------- parser
def test_commands_register_with_help():
    p = parser()
    args = p.parse_args(["trend", PRODUCT, ATTR, "--workspace", "W"])
    assert args.func is cmd_trend and args.window == 30 and args.out is None
    args = p.parse_args(["rebaseline", PRODUCT, ATTR, "--workspace", "W", "--reason", "r", "--identity", "b",
                         "--from-lot", "L", "--count", "7"])
    assert args.func is cmd_rebaseline and (args.from_lot, args.count) == ("L", 7)
    for command, words in (("trend", "Cpk/Ppk"), ("rebaseline", "who did it and why")):
        with pytest.raises(SystemExit) as stop:
            p.parse_args([command, "--help"])
        assert stop.value.code == 0
    text = p.format_help()
    assert "trend" in text and "rebaseline" in text


# --------------------------------------------------------------------------- trend
def test_trend_prints_the_chart_numbers_worked_by_hand(tmp_path, capsys):
    # Worked by hand: 200, 204, 202, 206, 204 -> centre 1016/5 = 203.2; moving ranges 4, 2, 4, 2 ->
    # MR-bar 3.0; sigma-hat = 3/1.128 = 2.659574; UCL 203.2 + 7.978723 = 211.178723;
    # LCL 195.221277; MR UCL 3.267 * 3 = 9.801.
    # The held lot T-006 (190) is shown but left out of capability (released lots only): against
    # 150-260 (LLC-200 v3.1) Cpk = 53.2/7.978723 = 6.67, Ppk = 53.2/6.841053 = 7.78 (worked by hand).
    ws = workspace(tmp_path)
    add_lot(Store(f"sqlite:///{ws / 'lotgate.db'}"), "T-006", 190.0, held=("out of trend",),
            trend_signals=("Specific activity: Nelson rule 1 (one point beyond 3σ) at lot T-006",))
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(ws)]) == 0
    out = capsys.readouterr().out
    assert "version 1 (active)" in out and "by lotgate (baseline reached)" in out
    assert "baseline lots   5: T-001 … T-005" in out
    assert "centre          203.20 U/mg" in out
    assert "sigma           2.66 U/mg" in out
    assert "UCL / LCL       211.18 / 195.22 U/mg" in out
    assert "MR̄ / MR UCL     3.00 / 9.80 U/mg" in out
    assert "Cpk 6.67" in out and "Ppk 7.78" in out  # the held lot does not count for capability
    assert "over the 5 released lots in the window (1 held lot left out)" in out
    row = next(line for line in out.splitlines() if line.strip().startswith("T-006"))
    assert "held: out of trend" in row and ">3σ below" in row and "rule 1" in row  # 190 < LCL 195.2
    first = next(line for line in out.splitlines() if line.strip().startswith("T-001"))
    assert "released (baseline)" in first and "1–2σ below" in first  # 200 < 203.2 - 2.66
    assert (ws / "charts" / f"{PRODUCT}_{ATTR}_trend.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (ws / "charts" / f"{PRODUCT}_{ATTR}_trend.pdf").read_bytes()[:5] == b"%PDF-"


def test_trend_capability_worked_by_hand(tmp_path, capsys):
    # Released lots only, centre 203.2, nearest limit LSL 150 at 53.2: Cpk = 53.2/(3 * 2.659574)
    # = 6.67; s = sqrt(20.8/4) = 2.280351, Ppk = 53.2/6.841053 = 7.78 (worked by hand).
    ws = workspace(tmp_path)
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(ws), "--out", str(tmp_path / "out")]) == 0
    out = capsys.readouterr().out
    # Bissell 1990 (from memory): SE(Cpk) = sqrt(1/45 + 6.667733^2/(2*2.48)) = 2.997610 with the
    # moving range's nu = 0.62*4 (Wheeler & Chambers, from memory), 95 % interval 6.667733 -/+
    # 1.959964*2.997610 -> 0.79 to 12.54; Ppk 7.776581 (s, nu = 4): SE 2.753475 -> 2.38 to 13.17.
    assert "Cpk 6.67, 95% CI 0.79–12.54" in out and "Ppk 7.78, 95% CI 2.38–13.17" in out
    assert "over the 5 released lots in the window; only 5 released lots (fewer than 30)" in out
    assert (tmp_path / "out" / f"{PRODUCT}_{ATTR}_trend.png").exists()


def test_trend_before_limits_are_frozen(tmp_path, capsys):
    ws = workspace(tmp_path, VALUES[:3], freeze=False)
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(ws), "--window", "2"]) == 0
    out = capsys.readouterr().out
    assert "not yet established: 3 of 20 baseline lots" in out  # LLC-200 baseline_n = 20
    assert "T-002" in out and "T-003" in out and "T-001" not in out  # window of 2
    assert (ws / "charts" / f"{PRODUCT}_{ATTR}_trend.png").stat().st_size > 10_000


@pytest.mark.parametrize(
    ("argv", "message", "code"),
    [  # exit 4: not found (an unknown product or attribute); 2: a request that cannot be met
        (["trend", "NOPE-1", ATTR], "unknown product 'NOPE-1'", 4),
        (["trend", PRODUCT, "colour"], "has no attribute 'colour'", 4),
        (["trend", PRODUCT, "protein"], "is not on a control chart", 2),
        (["trend", PRODUCT, ATTR, "--window", "0"], "--window must be at least 1", 2),
    ],
)
def test_trend_refusals(tmp_path, capsys, argv, message, code):
    ws = workspace(tmp_path)
    assert run([*argv, "--workspace", str(ws)]) == code
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1


def test_trend_needs_a_store(tmp_path, capsys):
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(tmp_path / "missing")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(tmp_path)]) == 2
    assert "no results store" in capsys.readouterr().err
    assert not (tmp_path / "lotgate.db").exists()  # nothing created by a look


# --------------------------------------------------------------------------- rebaseline
def _log(ws: Path) -> list[dict]:
    """The log's events, without the records-written events that name each transaction's rows."""
    return [record for line in (ws / "decisions.jsonl").read_text().splitlines()
            if (record := json.loads(line))["kind"] != "records-written"]


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["SIGNED"], "says too little"),
        (["--reason", "   ", "SIGNED"], "says too little"),
        (["--reason", "ok", "SIGNED"], "says too little"),  # the two-letter reason
        (["--reason", REASON], "signed by the person who decides it"),  # no identity: a typed name is gone
        (["--reason", REASON, "SIGNED-JONAS"], "does not hold the role 're-baseline'"),
        (["--reason", REASON, "SIGNED-SYSTEM"], "system's identity, not a person's"),
        (["--reason", REASON, "SIGNED", "--count", "1"], "at least 2 lots"),
        (["--reason", REASON, "SIGNED", "--from-lot", "T-005"], "20 baseline lots requested from T-005, but only 1"),
        (["--reason", REASON, "SIGNED", "--from-lot", "T-404", "--count", "2"], "T-404 is not among the released lots"),
        (["--reason", REASON, "SIGNED"], "20 baseline lots requested, but the chart has only 5"),
    ],
)
def test_rebaseline_refusals_change_nothing(tmp_path, capsys, extra, message):
    ws = workspace(tmp_path)
    before = (ws / "decisions.jsonl").read_bytes()
    system = ["--identity", str(ws / "keys" / "signer.p12"), "--passphrase-file", str(ws / "keys" / "signer.passphrase")]
    words = {"SIGNED": signed_by(ws), "SIGNED-JONAS": signed_by(ws, "jonas.brandt"), "SIGNED-SYSTEM": system}
    extra = [part for word in extra for part in words.get(word, [word])]
    assert run(["rebaseline", PRODUCT, ATTR, "--workspace", str(ws), *extra]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert (ws / "decisions.jsonl").read_bytes() == before
    assert active_limits(Store(f"sqlite:///{ws / 'lotgate.db'}"), PRODUCT, ATTR).version == 1


@pytest.mark.parametrize(("product", "attr", "message", "code"),
                         [("NOPE-1", ATTR, "unknown product", 4), (PRODUCT, "lead", "not on a control chart", 2)])
def test_rebaseline_refuses_unknown_charts(tmp_path, capsys, product, attr, message, code):
    ws = workspace(tmp_path)
    assert run(["rebaseline", product, attr, "--workspace", str(ws), "--reason", REASON, *signed_by(ws)]) == code
    assert message in capsys.readouterr().err


def test_rebaseline_is_stored_and_logged_with_who_and_why(tmp_path, capsys):
    # From T-002, three lots: 204, 202, 206 -> centre 204; moving ranges 2, 4 -> MR-bar 3;
    # sigma-hat 3/1.128 = 2.659574 (worked by hand).
    ws = workspace(tmp_path)
    reason = "Change control CC-0042: new purification resin from lot T-002 on"
    code = run(["rebaseline", PRODUCT, ATTR, "--workspace", str(ws), "--reason", reason,
                *signed_by(ws), "--from-lot", "T-002", "--count", "3"])
    assert code == 0
    out = capsys.readouterr().out
    assert "version 2" in out and "before" in out and "after" in out
    centre = next(line for line in out.splitlines() if line.strip().startswith("centre"))
    assert "203.20" in centre and "204.00" in centre  # old and new side by side
    store = Store(f"sqlite:///{ws / 'lotgate.db'}")
    active = active_limits(store, PRODUCT, ATTR)
    assert (active.version, active.frozen_by, active.reason) == (2, MIRA, reason)
    assert active.center == pytest.approx(204.0)
    assert active.sigma == pytest.approx(2.659574, rel=1e-6)
    assert active.baseline_lots == ("T-002", "T-003", "T-004")
    records = _log(ws)
    last = records[-1]
    assert last["kind"] == "limits-rebaselined"
    assert (last["by"], last["reason"], last["version"], last["previous_version"]) == (MIRA, reason, 2, 1)
    assert last["person"] == "mira.castellan" and last["role"] == "re-baseline"
    from pipeline.records.signing import (
        verify_record,  # the person's signature over the act (21 CFR 11.70)
    )
    act = {k: last[k] for k in ("product", "attribute", "center", "sigma", "mr_bar", "baseline_lots", "by", "reason")}
    assert verify_record(last["person_signature"], ledger.canonical_json(act).encode())
    assert not verify_record(last["person_signature"], ledger.canonical_json({**act, "sigma": 1.85}).encode())
    assert last["baseline_lots"] == ["T-002", "T-003", "T-004"]
    assert last["center"] == pytest.approx(204.0) and last["sigma"] == pytest.approx(2.659574, rel=1e-6)
    assert {"time_utc", "product", "attribute"} <= set(last) and last["product"] == PRODUCT
    check = ledger.verify_file(ws / "decisions.jsonl")
    # records-written events (one per transaction, naming its rows) are left out by _log
    assert check.valid and [r["kind"] for r in records] == ["limits-frozen", "signer-register-in-force",
                                                             "limits-rebaselined"]
    assert audit.verify_trail(store, ws / "decisions.jsonl").valid  # the store's chain agrees
    # the chart now reads against version 2
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(ws)]) == 0
    out = capsys.readouterr().out
    assert "version 2 (active)" in out and f"by {MIRA}" in out and reason in out
    assert "replaces        version 1" in out


def test_rebaseline_refuses_a_broken_log(tmp_path, capsys):
    ws = workspace(tmp_path)
    log = ws / "decisions.jsonl"
    log.write_text(log.read_text().replace('"version":1', '"version":9'))
    assert run(["rebaseline", PRODUCT, ATTR, "--workspace", str(ws), "--reason", REASON, *signed_by(ws),
                "--count", "3"]) == 2
    assert "audit trail is broken" in capsys.readouterr().err
    assert active_limits(Store(f"sqlite:///{ws / 'lotgate.db'}"), PRODUCT, ATTR).version == 1


# --------------------------------------------------------------------------- the demo workspace
@pytest.fixture(scope="module")
def demo_workspace(tmp_path_factory):
    root = tmp_path_factory.mktemp("trend-demo") / "ws"
    done = run_cli(["demo", "--workspace", root], cwd=REPO, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    return root


@pytest.mark.slow
def test_demo_chart_shows_the_out_of_trend_lot(demo_workspace, tmp_path, capsys):
    out_dir = tmp_path / "charts"
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(demo_workspace), "--out", str(out_dir)]) == 0
    out = capsys.readouterr().out
    row = next(line for line in out.splitlines() if line.strip().startswith("LLC-2611-027"))
    # the demo's planted lot: inside 150-260 U/mg, below the 3-sigma line (README table)
    assert "held: out of trend" in row and ">3σ below" in row and "rule 1: one point beyond 3σ" in row
    assert "LLC-2611-027: rule 1: one point beyond 3σ (found when the lot was decided" in out
    # LLC-2611-026 awaits its lead result at the end of the demo: pending, not on the chart
    assert any(line.strip().startswith("LLC-2611-026") and "pending" in line for line in out.splitlines()), out
    assert "version 1 (active)" in out and "baseline lots   20: LLC-2611-001 … LLC-2611-020" in out
    png = (out_dir / f"{PRODUCT}_{ATTR}_trend.png").read_bytes()
    pdf = (out_dir / f"{PRODUCT}_{ATTR}_trend.pdf").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 50_000
    import pypdf

    reader = pypdf.PdfReader(out_dir / f"{PRODUCT}_{ATTR}_trend.pdf")
    assert len(reader.pages) == 1 and pdf[:5] == b"%PDF-"
    text = reader.pages[0].extract_text()
    assert "LLC-2611-027" in text and "rule 1" in text and "UCL" in text


@pytest.mark.slow
def test_demo_chart_not_yet_established(demo_workspace, tmp_path, capsys):
    # PGR-040 releases fewer than its 20 baseline lots in the demo's four nights.
    assert run(["trend", "PGR-040", ATTR, "--workspace", str(demo_workspace), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "not yet established:" in out and "of 20 baseline lots" in out
    assert "PGR-2611-017" in out  # the out-of-specification lot is listed and drawn
    assert (tmp_path / f"PGR-040_{ATTR}_trend.png").exists()


@pytest.mark.slow
def test_demo_rebaseline_then_chart(demo_workspace, tmp_path, capsys):
    ws = tmp_path / "copy"
    shutil.copytree(demo_workspace, ws)
    assert run(["rebaseline", PRODUCT, ATTR, "--workspace", str(ws), "--from-lot", "LLC-2611-005",
                "--reason", "Change control CC-0107: new resin", *signed_by(ws)]) == 0
    capsys.readouterr()
    check = ledger.verify_file(ws / "decisions.jsonl")
    assert check.valid
    assert audit.verify_trail(Store(f"sqlite:///{ws / 'lotgate.db'}"), ws / "decisions.jsonl").valid
    assert _log(ws)[-1]["by"] == MIRA and _log(ws)[-1]["previous_version"] == 1
    assert _log(ws)[-1]["baseline_lots"][0] == "LLC-2611-005" and len(_log(ws)[-1]["baseline_lots"]) == 20
    assert run(["trend", PRODUCT, ATTR, "--workspace", str(ws), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "version 2 (active)" in out and "LLC-2611-005 … LLC-2611-024" in out
