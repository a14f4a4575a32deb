"""The tamper-evident decision log: JSON lines, each record chained to the one before.

Each record carries ``seq``, ``prev_hash`` (the previous record's ``hash``; 64 zeros for the
first) and ``hash`` = SHA-256 of the record's canonical JSON without the ``hash`` field. Editing,
deleting or reordering any record breaks the chain at that record, and ``verify_chain`` names it.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import LedgerError

__all__ = ["LedgerError", "append", "chain", "verify_file", "verify_records"]

GENESIS = "0" * 64


def canonical_json(record: dict[str, Any]) -> str:
    return json.dumps(record, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def record_hash(record: dict[str, Any]) -> str:
    body = {k: v for k, v in record.items() if k != "hash"}
    return hashlib.sha256(canonical_json(body).encode("utf-8")).hexdigest()


def chain(records: Iterable[dict[str, Any]], prev_hash: str = GENESIS, start_seq: int = 1) -> list[dict[str, Any]]:
    """Give each new record its sequence number, previous hash and own hash (pure)."""
    out = []
    seq = start_seq
    for record in records:
        body = {**record, "seq": seq, "prev_hash": prev_hash}
        body["hash"] = record_hash(body)
        out.append(body)
        prev_hash, seq = body["hash"], seq + 1
    return out


@dataclass(frozen=True)
class ChainCheck:
    valid: bool
    records: int
    first_bad_seq: int | None
    first_bad_line: int | None
    reason: str
    last_hash: str


def verify_records(lines: list[str]) -> ChainCheck:
    """Check a log's lines (pure): hashes, links and sequence numbers."""
    prev, expected_seq = GENESIS, 1
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            return ChainCheck(False, number - 1, None, number, f"line {number} is empty", prev)
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            return ChainCheck(False, number - 1, None, number, f"line {number} is not a JSON record", prev)
        seq = record.get("seq")
        if record.get("hash") != record_hash(record):
            return ChainCheck(False, number - 1, seq, number,
                              f"record {seq} (line {number}) was altered: its content no longer matches its hash", prev)
        if record.get("prev_hash") != prev:
            return ChainCheck(False, number - 1, seq, number,
                              f"record {seq} (line {number}) does not follow the record before it: a record was removed, inserted or moved", prev)
        if seq != expected_seq:
            return ChainCheck(False, number - 1, seq, number,
                              f"record on line {number} has number {seq}, expected {expected_seq}", prev)
        prev, expected_seq = record["hash"], expected_seq + 1
    return ChainCheck(True, len(lines), None, None, f"{len(lines)} records, chain intact", prev)


def read_lines(path: Path) -> list[str]:
    if not path.exists():
        return []
    text = path.read_text(encoding="utf-8")
    return text.splitlines()


def verify_file(path: Path) -> ChainCheck:
    return verify_records(read_lines(path))


def last_line(path: Path) -> tuple[str | None, int]:
    """The file's last complete line and the byte offset where a partial tail starts (or the size).

    Reads backwards from the end, so the cost does not grow with the log's length.
    """
    if not path.exists():
        return None, 0
    with open(path, "rb") as handle:
        handle.seek(0, os.SEEK_END)
        size = handle.tell()
        if size == 0:
            return None, 0
        block = 4096
        data = b""
        position = size
        while position > 0:
            step = min(block, position)
            position -= step
            handle.seek(position)
            data = handle.read(step) + data
            body_end = data.rfind(b"\n")
            if body_end != -1 and (data.rfind(b"\n", 0, body_end) != -1 or position == 0):
                break
        end = data.rfind(b"\n")
        if end == -1:
            return None, position  # only a partial line
        start = data.rfind(b"\n", 0, end) + 1
        return data[start:end].decode("utf-8"), position + end + 1


def append_chained(path: Path, records: list[dict[str, Any]]) -> None:
    """Append already-chained records (each with seq, prev_hash, hash) and flush them to disk.

    A partial last line left by a crash is cut off first; the caller's source of truth (the
    store) then writes it again.
    """
    _, good_end = last_line(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "ab") as handle:
        if handle.tell() != good_end:
            handle.truncate(good_end)
        handle.write("".join(canonical_json(r) + "\n" for r in records).encode("utf-8"))
        handle.flush()
        os.fsync(handle.fileno())


def append(path: Path, records: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Chain ``records`` onto the log at ``path`` and write them durably.

    The log is rewritten through a temporary file and an atomic rename, so a crash leaves either
    the old log or the new one, never half a line. Refuses to extend a broken chain.
    """
    lines = read_lines(path)
    check = verify_records(lines)
    if not check.valid:
        raise LedgerError(f"{path.name}: refusing to add to a broken log: {check.reason}")
    last_seq = json.loads(lines[-1])["seq"] if lines else 0
    chained = chain(records, prev_hash=check.last_hash, start_seq=last_seq + 1)
    if not chained:
        return []
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w", encoding="utf-8") as handle:
        for line in lines:
            handle.write(line + "\n")
        for record in chained:
            handle.write(canonical_json(record) + "\n")
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, path)
    return chained
