"""A large night is read and rendered across worker processes: the verdicts must not depend on it."""

import pandas as pd

from pipeline.demo import plant as demo
from pipeline.intake.problems import ExportRejected
from pipeline.night import receive
from pipeline.records.controlled_files import open_controlled_documents


def _inbox(tmp_path):
    files = dict(demo.build_scenario(nights=1, lipase_per_night=12, protease_per_night=8)[0].files)
    lims = sorted(name for name in files if name.startswith("lims-"))
    files[lims[0]] = files[lims[0]].replace(b".", b",", 3)  # decimal commas: a rejected export
    files["lims-empty.csv"] = b""
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    for name, data in files.items():
        (inbox / name).write_bytes(data)
    return [(path, "") for path in sorted(inbox.iterdir())], lims[0]


def _verdicts(pairs):
    out = {}
    for chunk, results in pairs:
        for (path, _), result in zip(chunk, results, strict=True):
            out[path.name] = result
    return out


def test_exports_parsed_on_workers_equal_those_parsed_here(tmp_path, monkeypatch):
    to_parse, commas = _inbox(tmp_path)
    _, layouts = open_controlled_documents()
    monkeypatch.setattr(receive, "PARALLEL_FROM_FILES", 10**9)
    here = _verdicts(receive.parse_in_chunks(to_parse, layouts))
    monkeypatch.setattr(receive, "PARALLEL_FROM_FILES", 1)
    monkeypatch.setattr(receive, "PARSE_CHUNK_FILES", 7)
    monkeypatch.setattr(receive.os, "cpu_count", lambda: 2)
    workers = _verdicts(receive.parse_in_chunks(to_parse, layouts))
    assert list(workers) == list(here) == [path.name for path, _ in to_parse]
    rejected = [name for name, result in here.items() if isinstance(result, ExportRejected)]
    assert {commas, "lims-empty.csv"} <= set(rejected) and len(rejected) < len(here)
    for name, result in here.items():
        other = workers[name]
        assert type(other) is type(result)
        if isinstance(result, ExportRejected):
            assert other.report() == result.report()
        else:
            assert (other.kind, other.sha256, other.layout_version, other.conversions) == \
                   (result.kind, result.sha256, result.layout_version, result.conversions)
            pd.testing.assert_frame_equal(other.frame, result.frame)
