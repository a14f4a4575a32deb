"""`lotgate bench` runs end to end and reports the figures it promises (no time is asserted)."""

import json
import os

import pytest

from tests.cli import run_cli

pytestmark = pytest.mark.slow


def test_bench_prints_its_figures_as_one_json_line(tmp_path):
    env = {**os.environ, "PREFECT_HOME": str(tmp_path / "prefect")}  # its own temporary server's database
    done = run_cli(["bench", "--lots", "30", "--json"], timeout=600, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    lines = done.stdout.strip().splitlines()
    figures = json.loads(lines[-1])
    # The keys the benchmark promises, and counts that must hold whatever the machine's speed.
    assert {"lots", "wall_s", "lots_per_s", "peak_rss_mb", "stage_s"} <= set(figures)
    assert figures["lots"] == 30 and figures["decided"] == 30
    assert set(figures["stage_s"]) == {"open_records", "receive", "assemble", "reread", "evaluate", "load_charts", "decide", "publish",
                                         "close"}
    assert all(value >= 0 for value in figures["stage_s"].values())
    assert figures["peak_tree_mb"] >= figures["peak_rss_mb"] > 0
    assert figures["orchestration_ratio"] == pytest.approx(figures["wall_s"] / figures["plain_wall_s"])
    assert figures["fit"]["max_relative_difference"] < 1e-6  # same parameters as curve_fit (issue target)
    assert figures["signing"]["documents"] > 0
    assert any(line.startswith("whole run") for line in lines)
