"""Exit codes, as documented in the README and ``lotgate --help``, checked command by command.

0 done, 1 only for a failed verification, 2 a set-up error (one line naming the file and the
field, no traceback), 3 the run lock (tests/test_postgres_runs.py), 4 not found, 5 a defect.
The attacks on main: a run without an inbox or keys took 17–24 s to fail (Prefect started
first); ``history`` of an unknown lot exited 1, the code of a failed verification.
"""

from __future__ import annotations

import re
import subprocess
import sys
import time
from pathlib import Path

import pytest

from flows import cli, records_cmd
from pipeline.records.store import Store

REPO = Path(__file__).resolve().parents[1]


def lotgate(*argv: str, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "flows.cli", *argv], capture_output=True, text=True,
                          timeout=timeout, cwd=REPO)


def _one_line(stderr: str) -> None:
    assert "Traceback" not in stderr and stderr.count("\n") == 1, stderr


@pytest.fixture()
def workspace(tmp_path, monkeypatch):
    """A workspace with a store (no decisions), a demo identity and an inbox."""
    monkeypatch.delenv("LOTGATE_DATABASE_URL", raising=False)
    (tmp_path / "inbox").mkdir()
    (tmp_path / "keys").mkdir()
    (tmp_path / "keys" / "use-demo-identity").touch()
    Store(f"sqlite:///{tmp_path / 'lotgate.db'}")
    return tmp_path


def test_the_help_lists_every_exit_code():
    text = cli.build_parser().format_help()
    for code, meaning in ((0, "done"), (1, "a verification failed"), (2, "set-up error"),
                          (3, "another night holds the workspace's run lock"), (4, "not found"), (5, "a defect")):
        assert f"  {code}  {meaning}" in text


@pytest.mark.parametrize(("prepare", "fragment"), [
    (lambda root: None, "inbox/ folder"),
    (lambda root: (root / "inbox").mkdir(), "no signing identity is set up"),
])
def test_a_run_that_cannot_start_fails_in_seconds_before_prefect(tmp_path, prepare, fragment):
    prepare(tmp_path)
    started = time.monotonic()
    done = lotgate("run", "--workspace", str(tmp_path))
    elapsed = time.monotonic() - started
    assert done.returncode == 2 and fragment in done.stderr
    _one_line(done.stderr)
    assert elapsed < 12, f"{elapsed:.1f} s"  # 15–24 s on main, where Prefect's server started first


@pytest.mark.parametrize(("settings", "fragment"), [
    ("databse_url: sqlite:///elsewhere.db\n", "unknown field 'databse_url' (did you mean 'database_url'?)"),
    ("signing: {p21: qa.p12}\n", "unknown field 'p21' in 'signing' (did you mean 'p12'?)"),
    ("signing: keys/qa.p12\n", "'signing' must be a mapping"),
    ("time_zone: Europe/Berln\n", "did you mean 'Europe/Berlin'"),
])
def test_a_bad_setting_is_exit_2_and_nothing_is_written(workspace, capsys, settings, fragment):
    (workspace / "workspace.yaml").write_text(settings, encoding="utf-8")
    (workspace / "inbox" / "lots-20261124.csv").write_bytes(b"lot_id\n")
    for argv in (["run", "--workspace", str(workspace), "--no-orchestration"],
                 ["history", "LOT-1", "--workspace", str(workspace)]):
        assert cli.main(argv) == 2
        err = capsys.readouterr().err
        assert f"{workspace / 'workspace.yaml'}: " in err and fragment in err
        _one_line(err)
    assert (workspace / "inbox" / "lots-20261124.csv").exists()
    assert not (workspace / "keys" / "signer.p12").exists()  # the demo identity was not taken instead
    assert not (workspace / "quarantine").exists()


def test_history_of_an_unknown_lot_is_not_found(workspace, capsys):
    assert cli.main(["history", "NOPE-1", "--workspace", str(workspace)]) == 4
    err = capsys.readouterr().err
    assert "no decision for lot NOPE-1" in err
    _one_line(err)


def test_deciding_an_unknown_lot_is_not_found(workspace, capsys):
    assert cli.main(["decide", "NOPE-1", "--release", "--reason", "reviewed", "--identity",
                     str(workspace / "absent.p12"), "--workspace", str(workspace)]) == 4
    assert "lot NOPE-1 has no decision" in capsys.readouterr().err


def test_verify_tells_a_missing_file_from_a_failed_verification(workspace, capsys):
    from pipeline.records.demo_trust import create_demo_trust

    create_demo_trust(workspace / "keys", "Riverside")
    bad = workspace / "certificate.pdf"
    bad.write_bytes(b"%PDF-1.7 not signed")
    named = ["--workspace", str(workspace)]
    assert cli.main(["verify", str(workspace / "absent.pdf"), *named]) == 4
    assert cli.main(["verify", str(bad), *named]) == 1
    assert cli.main(["verify", str(bad), str(workspace / "absent.pdf"), *named]) == 1  # a failed check wins
    assert cli.main(["verify", str(bad)]) == 2  # no issuing workspace named: a set-up error, one line
    out = capsys.readouterr().out
    assert "NOT FOUND" in out and "INVALID" in out


def test_a_defect_is_exit_5_with_the_details_in_a_file(workspace, capsys, monkeypatch):
    def broken(args):
        raise RuntimeError("a defect")

    monkeypatch.setattr(records_cmd, "cmd_history", broken)
    assert cli.main(["history", "LOT-1", "--workspace", str(workspace)]) == 5
    err = capsys.readouterr().err
    assert "RuntimeError: a defect" in err and "details for the engineer in" in err
    _one_line(err)
    details = Path(re.search(r"details for the engineer in (\S+?)\. Running", err).group(1))
    assert "RuntimeError" in details.read_text(encoding="utf-8")  # the traceback, kept for the engineer
    details.unlink()
