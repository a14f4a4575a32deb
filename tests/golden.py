"""What a demo workspace holds, as text that is the same on every run of the same code.

Used by ``tests/test_golden_demo.py`` (a change of structure must not change a result) and by
``python tests/golden.py WORKSPACE`` (to refresh the expected files, only in a commit that changes
behaviour on purpose and says so).

What varies from run to run is masked, and nothing else: clock times (UTC and local), the hashes
of files that contain a time (reports, certificates, LIMS files), the audit chain's hashes (its
events carry times), the fingerprint of the demo signer's certificate (a new key per
workspace), each night's workspace identity (a random id), and a person's signature over a
record with its SHA-256 (the record carries its time; ECDSA signatures differ on every signing). Unrounded numbers in the store
are compared to 10 significant digits, and the store's and LIMS files' unrounded numbers within
1 part in 10⁸ (``same_but_last_digits``): the fitting engine, or a new numpy, may take another path
to the same minimum, which moves the last digits; every number a person reads (documents, reported
values) is compared character for character.
"""

from __future__ import annotations

import json
import re
import sqlite3
import subprocess
import sys
from pathlib import Path

GOLDEN = Path(__file__).parent / "golden" / "demo"

_TIME = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?(\+00:00|Z)?")
_HEX = re.compile(r"[0-9a-f]{12,64}")
# A person's record signature (ECDSA: new each time), an investigation's signature, the hash of a
# record holding times, a row hash (it covers its times), and the demo register's dates (the day
# the demo ran) are masked too.
_MASKED_COLUMNS = {"prev_hash", "hash", "workspace_id", "signature", "person_signature", "record_sha256",
                   "valid_from", "valid_to", "row_sha256"}
_DIGITS = 10


def _volatile_hashes(root: Path, db: sqlite3.Connection) -> set[str]:
    import hashlib

    hashes = set()
    for folder in ("certificates", "reports", "lims"):
        for path in (root / folder).glob("*"):
            if path.is_file():
                hashes.add(hashlib.sha256(path.read_bytes()).hexdigest())
    for (body,) in db.execute("select record from decisions"):
        certificate = json.loads(body).get("certificate") or {}
        for key in ("sha256", "signer_certificate_sha256"):
            if certificate.get(key):
                hashes.add(certificate[key])
    for prev, own in db.execute("select prev_hash, hash from audit_events"):
        hashes.update((prev, own))
    register = root / "keys" / "signers.yaml"  # the demo register names each run's new certificates
    if register.exists():
        import yaml

        data = register.read_bytes()
        hashes.add(hashlib.sha256(data).hexdigest())
        hashes.update(e["certificate_sha256"] for e in (yaml.safe_load(data) or {}).get("signers", [])
                      if e.get("certificate_sha256"))
    return hashes


def _text(value: str, volatile: set[str]) -> str:
    value = _TIME.sub("<time>", value)

    def hex_run(match: re.Match[str]) -> str:
        run = match.group(0)
        return "<volatile-sha256>" if any(h.startswith(run) for h in volatile) else run

    return _HEX.sub(hex_run, value)


def _value(value, volatile: set[str]):
    if isinstance(value, float):
        return float(f"{value:.{_DIGITS}g}")
    if isinstance(value, str):
        stripped = value.strip()
        if stripped[:1] in "{[":
            try:
                return _value(json.loads(value), volatile)
            except ValueError:
                pass
        return _text(value, volatile)
    if isinstance(value, dict):
        return {k: ("<masked>" if k in _MASKED_COLUMNS else _value(v, volatile)) for k, v in value.items()}
    if isinstance(value, list):
        return [_value(v, volatile) for v in value]
    return value


def _table(db: sqlite3.Connection, table: str, volatile: set[str]) -> str:
    cursor = db.execute(f"select * from {table} order by 1")  # noqa: S608 (names from sqlite_master)
    columns = [c[0] for c in cursor.description]
    lines = []
    for row in cursor:
        record = {}
        for column, value in zip(columns, row, strict=True):
            if column in _MASKED_COLUMNS or column.endswith("_utc"):
                record[column] = "<masked>" if value is not None else None
            else:
                record[column] = _value(value, volatile)
        lines.append(json.dumps(record, sort_keys=True, ensure_ascii=False))
    return "\n".join(lines) + "\n"


def capture(root: Path) -> dict[str, str]:
    """Relative name → normalised text, for everything a demo workspace holds."""
    db = sqlite3.connect(root / "lotgate.db")
    try:
        volatile = _volatile_hashes(root, db)
        out: dict[str, str] = {}
        tables = [name for (name,) in db.execute("select name from sqlite_master where type='table' order by name")
                  if name != "alembic_version"]
        for table in tables:
            out[f"store/{table}.jsonl"] = _table(db, table, volatile)
    finally:
        db.close()
    for path in sorted((root / "lims").glob("*")):
        out[f"lims/{path.name}"] = _text(path.read_text(encoding="utf-8"), volatile)
    for folder in ("reports", "certificates"):
        for path in sorted((root / folder).glob("*.pdf")):
            text = subprocess.run(["pdftotext", "-layout", str(path), "-"], check=True, capture_output=True,
                                  text=True).stdout
            out[f"documents/{path.name}.txt"] = _text(text, volatile)
    out["files.txt"] = "".join(
        f"{p.relative_to(root)}\n" for p in sorted(root.rglob("*"))
        if p.is_file() and p.parts[len(root.parts)] in ("archive", "quarantine", "certificates", "reports", "lims"))
    for path in sorted((root / "quarantine").glob("*.reason.txt")):
        out[f"quarantine/{path.name}"] = _text(path.read_text(encoding="utf-8"), volatile)
    return out


_NUMBER = re.compile(r"-?\d+\.\d+(?:[eE][-+]?\d+)?")
_RELATIVE = 1e-8  # far below any digit a person reads; far above a library's last-digit drift


def same_but_last_digits(expected: str, now: str) -> bool:
    """True when two texts differ only in unrounded numbers, each by less than 1 part in 10⁸.

    A numerical library's new release may move the 10th significant digit of a fitted value (another
    path to the same minimum, another summation order); a reported value, rounded to the digits of
    its limit, cannot move by so little without changing a digit, so it still has to match exactly.
    """
    if _NUMBER.sub("#", expected) != _NUMBER.sub("#", now):
        return False
    for a, b in zip(_NUMBER.findall(expected), _NUMBER.findall(now), strict=True):
        x, y = float(a), float(b)
        if a != b and abs(x - y) > _RELATIVE * max(abs(x), abs(y)):
            return False
    return True


def differs(name: str, expected: str, now: str | None) -> bool:
    """Whether an artefact differs from its expected copy (the store and LIMS files within their last digits)."""
    if now == expected:
        return False
    return not (now is not None and name.startswith(("store/", "lims/")) and same_but_last_digits(expected, now))


def write_golden(root: Path, target: Path = GOLDEN) -> int:
    import shutil

    if target.exists():
        shutil.rmtree(target)
    captured = capture(root)
    for name, text in captured.items():
        path = target / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
    return len(captured)


def read_golden(target: Path = GOLDEN) -> dict[str, str]:
    return {str(p.relative_to(target)): p.read_text(encoding="utf-8") for p in sorted(target.rglob("*")) if p.is_file()}


if __name__ == "__main__":
    print(f"{write_golden(Path(sys.argv[1]))} files written to {GOLDEN}")
