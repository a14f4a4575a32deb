"""The signing passphrase stays where it is needed: read once, out of every child process's environment.

The attack on main: LOTGATE_SIGNING_PASSPHRASE was inherited by Prefect's server process (and so
readable in its /proc/PID/environ for the whole night); a failing unlock hid its cause.
"""

from __future__ import annotations

import datetime as dt
import os
import pickle
import subprocess
import sys

import pytest

from pipeline.errors import SigningError
from pipeline.records import signing
from pipeline.records.demo_identity import create_demo_identity

VARIABLE = signing.DEFAULT_PASSPHRASE_ENV


@pytest.fixture()
def plant(tmp_path, monkeypatch):
    """A workspace whose own identity's passphrase comes only from the environment."""
    monkeypatch.setattr(signing, "_TAKEN", {})
    identity = create_demo_identity(tmp_path / "qa", "Riverside", "Dana Whitlock", system=True)  # the system's
    secret = identity.passphrase_path.read_text(encoding="utf-8").strip()
    identity.passphrase_path.unlink()  # only the environment knows it
    (tmp_path / "workspace.yaml").write_text(f"signing: {{p12: {identity.p12_path}}}\n", encoding="utf-8")
    (tmp_path / "inbox").mkdir()
    monkeypatch.setenv(VARIABLE, secret)
    return tmp_path, secret


def _child_sees(variable: str) -> str:
    done = subprocess.run([sys.executable, "-c", f"import os; print(os.environ.get({variable!r}, 'absent'))"],
                          capture_output=True, text=True, timeout=60, check=True)
    return done.stdout.strip()


def test_opening_the_night_takes_the_passphrase_out_of_the_environment(plant):
    from pipeline.night.open import open_night

    root, secret = plant
    assert _child_sees(VARIABLE) == secret  # before: every child process inherits it
    ws, store, signer = open_night(root)
    assert signer.signer_name == "lotgate system — Riverside (DEMO)"
    assert VARIABLE not in os.environ
    assert _child_sees(VARIABLE) == "absent"
    # Read once: the flow opens the night again in the same process and still unlocks the key.
    assert open_night(root)[2].fingerprint_sha256 == signer.fingerprint_sha256
    assert secret not in repr(signer)


def test_prefect_starts_only_after_the_passphrase_left_the_environment(plant, monkeypatch):
    from flows import cli

    root, _ = plant
    seen = []

    class Stop(Exception):
        pass

    def server_started_early(orchestrated=True):
        seen.append(os.environ.get(VARIABLE, "absent"))
        raise Stop

    monkeypatch.setattr(cli, "server_started_early", server_started_early)
    with pytest.raises(Stop):
        cli._run_night(root)
    assert seen == ["absent"]


def test_rendering_workers_sign_without_the_passphrase_in_their_environment(plant):
    from pipeline.night.open import open_night
    from pipeline.night.workers import process_pool, render, renderer_start
    from tests.dossiers import SIGNATURE, example_dossier

    root, _ = plant
    ws, _, signer = open_night(root)
    signature = {**SIGNATURE, "signed_at_utc": dt.datetime.now(dt.UTC).isoformat()}
    with process_pool(1, renderer_start, (ws.plant_name, signer)) as pool:
        assert pool.submit(os.getenv, VARIABLE).result(timeout=120) is None  # the fork server's child
        report, certificate = pool.submit(render, (example_dossier(), signature)).result(timeout=300)
    assert report.startswith(b"%PDF") and certificate is not None and b"/ByteRange" in certificate


def test_the_signer_travels_to_a_worker_without_the_environment(plant):
    from pipeline.night.open import open_night

    root, _ = plant
    signer = open_night(root)[2]
    assert VARIABLE not in os.environ
    copy = pickle.loads(pickle.dumps(signer))
    assert (copy.signer_name, copy.fingerprint_sha256) == (signer.signer_name, signer.fingerprint_sha256)


def test_a_failing_unlock_keeps_its_cause_and_not_the_secret(tmp_path):
    identity = create_demo_identity(tmp_path, "Riverside", "Dana Whitlock")
    wrong = b"correct horse battery staple"
    with pytest.raises(SigningError) as refused:
        signing.load_identity(identity.p12_path, passphrase=wrong)
    message = str(refused.value)
    assert refused.value.__cause__ is not None  # raise ... from exc
    assert "Invalid password or PKCS12 data" in message  # the cryptography library's own words
    assert str(identity.p12_path) in message and wrong.decode() not in message



def test_a_person_s_identity_is_never_sent_to_a_worker(tmp_path):
    from pipeline.night.open import IdentitySigner

    identity = create_demo_identity(tmp_path, "Riverside", "Dana Whitlock")
    signer = IdentitySigner(signing.load_identity(identity.p12_path, passphrase_file=identity.passphrase_path))
    with pytest.raises(SigningError, match="unlocked in this process only"):
        pickle.dumps(signer)
