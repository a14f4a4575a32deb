"""The hash-chained decision log: any edit, deletion or reordering is found and named."""

import json

import pytest

from pipeline.records import ledger


@pytest.fixture
def log(tmp_path):
    path = tmp_path / "decisions.jsonl"
    ledger.append(path, [{"kind": "decision", "lot_id": f"LOT-{i:03d}", "disposition": "released"} for i in range(5)])
    return path


def test_intact_chain_verifies(log):
    check = ledger.verify_file(log)
    assert check.valid and check.records == 5


def test_edited_record_is_named(log):
    lines = log.read_text().splitlines()
    record = json.loads(lines[2])
    record["disposition"] = "held"
    lines[2] = json.dumps(record)
    log.write_text("\n".join(lines) + "\n")
    check = ledger.verify_file(log)
    assert not check.valid and check.first_bad_seq == 3 and "altered" in check.reason


def test_deleted_record_is_found(log):
    lines = log.read_text().splitlines()
    del lines[1]
    log.write_text("\n".join(lines) + "\n")
    check = ledger.verify_file(log)
    assert not check.valid and check.first_bad_seq == 3 and check.first_bad_line == 2


def test_reordered_records_are_found(log):
    lines = log.read_text().splitlines()
    lines[1], lines[3] = lines[3], lines[1]
    log.write_text("\n".join(lines) + "\n")
    assert not ledger.verify_file(log).valid


def test_broken_log_is_not_extended(log):
    log.write_text(log.read_text().replace("LOT-000", "LOT-999"))
    with pytest.raises(ledger.LedgerError, match="broken log"):
        ledger.append(log, [{"kind": "decision"}])


def test_hash_is_sha256_of_canonical_json():
    # The hash definition: SHA-256 (FIPS 180-4) over the record's sorted, compact JSON without 'hash'.
    import hashlib
    record = ledger.chain([{"a": 1}])[0]
    body = json.dumps({"a": 1, "prev_hash": "0" * 64, "seq": 1}, sort_keys=True, separators=(",", ":"))
    assert record["hash"] == hashlib.sha256(body.encode()).hexdigest()


def test_results_become_json_values_whatever_their_numeric_type():
    # JSON (RFC 8259) has no NaN or infinity: a non-finite number is stored as null. numpy
    # scalars become Python numbers and tuples become lists, at any depth.
    import numpy as np

    from pipeline.plain_data import to_plain

    value = {"a": np.float64(1.5), "b": (np.int64(2), float("nan")), 3: [np.float32(np.inf), {"c": True}],
             "d": None, "e": "text", "f": -float("inf")}
    cleaned = to_plain(value)
    assert cleaned == {"a": 1.5, "b": [2, None], "3": [None, {"c": True}], "d": None, "e": "text", "f": None}
    assert type(cleaned["a"]) is float and type(cleaned["b"][0]) is int
    assert json.loads(json.dumps(cleaned, allow_nan=False)) == cleaned
