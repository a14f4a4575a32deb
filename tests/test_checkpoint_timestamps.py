"""A checkpoint sealed with an RFC 3161 time stamp from a local time-stamping authority.

The authority is certomancer's in-process TSA service (``certomancer.services.TimeStamper``) with
a test CA and a TSA certificate made here (extended key usage id-kp-timeStamping, critical, as
RFC 3161 section 2.3 requires), served over HTTP on 127.0.0.1 on a free port by a thread of this
test (stopped when the test ends); the night's side uses pyHanko's ``HTTPTimeStamper`` on that URL,
as a plant's configured ``records.timestamp_url`` would.
"""

from __future__ import annotations

import datetime as dt
import json
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest
from asn1crypto import keys as asn1_keys
from asn1crypto import tsp
from asn1crypto import x509 as asn1_x509
from certomancer.services import TimeStamper
from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from flows.cli import build_parser
from pipeline.night.open import opened_signer
from pipeline.night.seal import seal
from pipeline.records import checkpoints
from pipeline.records.demo_identity import create_demo_identity
from pipeline.records.workspace import open_workspace, write_settings
from tests.records_fixture import filled_workspace, settings_of


def _tsa_identity():
    """A test root CA and a time-stamping certificate it issued (ECDSA P-256)."""
    now = dt.datetime.now(dt.UTC) - dt.timedelta(minutes=5)
    root_key, tsa_key = ec.generate_private_key(ec.SECP256R1()), ec.generate_private_key(ec.SECP256R1())
    root_name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "Tarnwick test time-stamping root (TEST)")])
    root = (x509.CertificateBuilder().subject_name(root_name).issuer_name(root_name).public_key(root_key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now).not_valid_after(now + dt.timedelta(days=2))
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .sign(root_key, hashes.SHA256()))
    tsa = (x509.CertificateBuilder()
           .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "Tarnwick test TSA (TEST)")]))
           .issuer_name(root_name).public_key(tsa_key.public_key()).serial_number(x509.random_serial_number())
           .not_valid_before(now).not_valid_after(now + dt.timedelta(days=2))
           .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.TIME_STAMPING]), critical=True)
           .add_extension(x509.KeyUsage(True, True, False, False, False, False, False, False, False), critical=True)
           .sign(root_key, hashes.SHA256()))
    der = serialization.Encoding.DER
    key_der = tsa_key.private_bytes(der, serialization.PrivateFormat.PKCS8, serialization.NoEncryption())
    return (asn1_x509.Certificate.load(tsa.public_bytes(der)), asn1_keys.PrivateKeyInfo.load(key_der),
            asn1_x509.Certificate.load(root.public_bytes(der)))


@pytest.fixture
def tsa_url():
    cert, key, root = _tsa_identity()
    stamper = TimeStamper(cert, key, certs_to_embed=[root])
    served = []

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self):  # noqa: N802 - http.server's name
            request = tsp.TimeStampReq.load(self.rfile.read(int(self.headers["Content-Length"])))
            body = stamper.request_tsa_response(request).dump()
            served.append(request)
            self.send_response(200)
            self.send_header("Content-Type", "application/timestamp-reply")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *_):
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}/tsa", served
    finally:
        server.shutdown()
        server.server_close()
        thread.join(10)


def test_a_checkpoint_carries_a_verified_rfc3161_time_stamp(tmp_path, tsa_url, capsys):
    url, served = tsa_url
    db = f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}"
    ws, store = filled_workspace(tmp_path / "ws", db)
    write_settings(ws.root, settings_of(db, records={"timestamp_url": url}))
    ws = open_workspace(ws.root)
    [written] = seal(ws, store, "test", opened_signer(ws.keys / "signer.p12", ws.keys / "signer.passphrase", None))
    assert len(served) == 1  # the authority was asked once, for this signature
    sealed = json.loads(written.read_text())
    assert sealed["timestamped"] is True
    check = checkpoints.check_signature(sealed)
    assert check.ok and check.timestamp_utc is not None
    stamped = dt.datetime.fromisoformat(check.timestamp_utc)
    assert abs((stamped - dt.datetime.now(dt.UTC)).total_seconds()) < 120
    args = build_parser().parse_args(["verify", "--workspace", str(ws.root)])
    assert args.func(args) == 0
    assert f"time-stamped {check.timestamp_utc}" in capsys.readouterr().out


def test_an_unreachable_authority_is_said_in_words(tmp_path):
    db = f"sqlite:///{tmp_path / 'ws' / 'lotgate.db'}"
    ws, store = filled_workspace(tmp_path / "ws", db)
    write_settings(ws.root, {"database_url": db, "records": {"timestamp_url": "http://127.0.0.1:9/nothing-here"}})
    ws = open_workspace(ws.root)
    keys = create_demo_identity(tmp_path / "keys", "Tarnwick Bioprocess test plant", "Stamp tester")
    from pipeline.errors import SigningError

    with pytest.raises(SigningError, match="the checkpoint of record .* could not be signed"):
        seal(ws, store, "test", opened_signer(keys.p12_path, keys.passphrase_path, None))
