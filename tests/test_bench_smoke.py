"""Smoke test of ``ranktide bench`` in its smallest mode (no timing assertions).

Runs ``ranktide bench --size tiny --batches 1,10,100 --json --skip-e2e`` in a
subprocess and checks that the one JSON object it prints has the headline
keys, that the figures are finite and positive, and that every measured
error of the incremental engine lies within its certified bound, itself
within the tolerance 1e-6.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

TOLERANCE = 1e-6
#: The reference is an exact solve certified to 1e-11; its own error may show.
REFERENCE_SLACK = 1e-10


@pytest.fixture(scope="module")
def report() -> dict:
    cmd = [sys.executable, "-m", "ranktide.stream.cli", "bench", "--size", "tiny", "--batches", "1,10,100",
           "--repeats", "2", "--profiles", "1", "--json", "--skip-e2e"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout)


def _positive(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value) and value > 0


def test_headline_keys_are_finite_and_positive(report: dict) -> None:
    for key in ("speedup_vs_warm_start", "events_per_second", "events_per_second_apply_only",
                "events_per_second_backlog_schedule"):
        assert _positive(report[key]), (key, report[key])
    assert report["end_to_end_events_per_second"] is None
    assert report["end_to_end"]["skipped"]
    assert report["speedup_vs_warm_start_batch"] == 100


def test_every_batch_size_is_measured_by_every_contender(report: dict) -> None:
    assert [row["batch"] for row in report["batches"]] == [1, 10, 100]
    for row in report["batches"]:
        for name in ("ranktide", "warm_start", "cold_start", "igraph_prpack", "networkx"):
            assert _positive(row[name]["seconds_per_batch"]), (row["batch"], name)
            assert _positive(row[name]["seconds_per_event"]), (row["batch"], name)
        for name, ratio in row["speedup"].items():
            assert _positive(ratio), (row["batch"], name)


def test_measured_error_within_certified_bound_within_tolerance(report: dict) -> None:
    rows = report["batches"] + report["real_graph"]["batches"] + [report["personalized"]]
    for row in rows:
        ours = row["ranktide"]
        assert ours["max_certified_bound"] <= TOLERANCE, row["batch"]
        assert ours["max_error"] <= ours["max_certified_bound"] + REFERENCE_SLACK, row["batch"]
        for name in ("warm_start", "cold_start"):
            assert row[name]["max_error"] <= TOLERANCE + REFERENCE_SLACK, (row["batch"], name)


def test_other_sections_report_positive_figures(report: dict) -> None:
    load = report["load"]
    for key in ("load_seconds", "resolve_seconds", "bytes_per_edge", "peak_rss_bytes_after_load"):
        assert _positive(load[key]), key
    assert report["throughput"]["certified_bound_after"] <= TOLERANCE
    assert report["backlog"]["certified_bound_after"] <= TOLERANCE
    assert report["backlog"]["settles"] >= 1
    assert _positive(report["snapshot"]["write_seconds"]) and _positive(report["snapshot"]["load_seconds"])
    assert report["snapshot"]["round_trip_same_size"]
    for fmt in ("jsonl", "parquet"):
        part = report["replay"][fmt]
        assert _positive(part["ratio"]), fmt
        assert part["events_applied"] == report["replay"]["events"], fmt
    command = report["replay"]["command"]  # ranktide replay in a child process against the orjson floor
    assert command["events_applied"] == command["events"] == command["inserts"] + command["mixed"]
    assert _positive(command["ratio"]) and command["ratio"] == command["replay_seconds"] / command["orjson_floor_seconds"]
    for key in ("imports_seconds", "read_parse_seconds", "apply_seconds", "snapshot_seconds", "start_up_seconds"):
        assert _positive(command["breakdown"][key]), key
    assert report["machine"]["nproc"] >= 1


def test_per_node_section_holds_its_contract(report: dict) -> None:
    """The per-node section: its keys, ranktide within every bound and within rtol on every batch."""
    per_node = report["per_node"]
    assert per_node["rtol"] == 1e-3
    for key in ("speedup_vs_warm_start", "speedup_vs_oracle_warm_start"):
        assert set(per_node[key]) == {"1", "10", "100"}
        assert all(_positive(v) for v in per_node[key].values()), key
    assert _positive(per_node["latency_ms"]["p50"]) and per_node["latency_ms"]["p99"] >= per_node["latency_ms"]["p50"]
    assert _positive(per_node["events_per_second"])
    assert per_node["within_bounds"] is True
    assert per_node["max_relative_error"] <= per_node["rtol"]
    for row in per_node["batches"] + [per_node["personalized"]]:
        assert row["ranktide"]["within_bounds"] and row["ranktide"]["max_relative_error"] <= 1e-3, row["batch"]
        # the certified warm start keeps the same promise
        assert row["warm_start"]["max_relative_error"] <= 1e-3, row["batch"]


def test_the_per_node_section_runs_alone_and_holds_its_contract() -> None:
    """``python -m ranktide.replay.bench_per_node`` prints the section ``ranktide bench`` has."""
    cmd = [sys.executable, "-m", "ranktide.replay.bench_per_node", "--size", "tiny", "--batches", "1,10",
           "--repeats", "1", "--json"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    section = json.loads(done.stdout)["per_node"]
    assert [row["batch"] for row in section["batches"]] == [1, 10]
    assert section["within_bounds"] is True and section["max_relative_error"] <= section["rtol"]
    assert _positive(section["push_ns_per_edge"]) and _positive(section["latency_ms"]["p50"])
