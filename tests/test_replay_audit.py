"""Replay options, the audit, reading commands and the demo.

Outside references: NetworkX ``pagerank`` (independent scores of the same
graph, for the audit's measured error) on random logs and on NetworkX's
bundled Les Miserables and karate club graphs.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from ranktide.replay.audit import audit_snapshot
from ranktide.replay.replay import ReplayOptions, replay_log
from stream_helpers import Stream, check_snapshot_against

TOLERANCE = 1e-6


def _write_log(path: Path, stream: Stream, ts_step_ms: int = 0) -> None:
    with open(path, "wb") as fh:
        for i, (_, value) in enumerate(stream.records):
            if ts_step_ms and value.startswith(b"{") and value.endswith(b"}") and b'"op": "' in value:
                rec = json.loads(value)
                rec["ts"] = 1_700_000_000_000 + i * ts_step_ms
                value = json.dumps(rec).encode()
            fh.write(value + b"\n")


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "--log-level", "WARNING", *args],
                          capture_output=True, text=True, timeout=300)


def _scores(snap: Path, profile: str = "global") -> dict[str, float]:
    return {r["node"]: r["score"] for r in pq.read_table(snap / "scores.parquet").to_pylist() if r["profile"] == profile}


@pytest.fixture(scope="module")
def random_log(tmp_path_factory) -> tuple[Path, Stream]:
    stream = Stream()
    stream.extend(np.random.default_rng(31), 20_000, n_nodes=800)
    path = tmp_path_factory.mktemp("log") / "events.jsonl"
    _write_log(path, stream)
    return path, stream


def test_from_a_snapshot_plus_the_rest_equals_one_whole_replay(random_log, tmp_path: Path) -> None:
    log, stream = random_log
    whole = replay_log(log, tmp_path / "whole", ReplayOptions(tolerance=TOLERANCE))
    part = replay_log(log, tmp_path / "part", ReplayOptions(until=9_000, tolerance=TOLERANCE))
    assert part.counters.events_applied + part.counters.events_rejected == 9_000
    rest = replay_log(log, tmp_path / "part", ReplayOptions(from_snapshot=part.snapshot))
    assert rest.counters == whole.counters
    assert (rest.snapshot / "edges.parquet").read_bytes() == (whole.snapshot / "edges.parquet").read_bytes()
    a, b = _scores(rest.snapshot), _scores(whole.snapshot)
    assert a.keys() == b.keys()
    assert sum(abs(a[n] - b[n]) for n in a) <= 2 * TOLERANCE  # each within TOLERANCE of the truth
    check_snapshot_against(stream, rest.snapshot, TOLERANCE)


def test_snapshot_every_leaves_a_series_and_replays_are_deterministic(random_log, tmp_path: Path) -> None:
    log, _ = random_log
    first = replay_log(log, tmp_path / "a", ReplayOptions(snapshot_every=5_000))
    second = replay_log(log, tmp_path / "b", ReplayOptions(snapshot_every=5_000))
    assert len(first.snapshots) == 5  # 4 at 5k, 10k, 15k, 20k records, and the final one
    seen = [json.loads((s / "manifest.json").read_text()) for s in first.snapshots]
    assert [m["events_applied"] + m["events_rejected"] for m in seen[:4]] == [5_000, 10_000, 15_000, 20_000]
    for x, y in zip(first.snapshots, second.snapshots):
        for name in ("scores.parquet", "edges.parquet", "seeds.parquet"):
            assert (x / name).read_bytes() == (y / name).read_bytes()
        mx, my = (json.loads((s / "manifest.json").read_text()) for s in (x, y))
        mx.pop("created_at"), my.pop("created_at")
        assert mx == my


def test_scores_do_not_depend_on_the_thread_count(random_log, tmp_path: Path) -> None:
    """Parallel sweeps sum in fixed chunks: one thread and two give the same files."""
    import os

    log, _ = random_log
    files = {}
    for threads in ("1", "2"):
        out = tmp_path / f"threads-{threads}"
        done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "--log-level", "WARNING", "replay", str(log),
                               "--out", str(out), "--micro-batch", "500"],
                              capture_output=True, text=True, timeout=300,
                              env={**os.environ, "NUMBA_NUM_THREADS": threads})
        assert done.returncode == 0, done.stderr[-2000:]
        snap = max(out.glob("snap-*"))
        files[threads] = {name: (snap / name).read_bytes() for name in ("scores.parquet", "edges.parquet")}
    assert files["1"] == files["2"]


def test_until_a_time_and_pace(tmp_path: Path) -> None:
    stream = Stream()
    stream.extend(np.random.default_rng(3), 400, bad_share=0.0)
    log = tmp_path / "timed.jsonl"
    _write_log(log, stream, ts_step_ms=10)  # 400 events over 4 s of event time
    cut = 1_700_000_000_000 + 199 * 10
    half = replay_log(log, tmp_path / "half", ReplayOptions(until=float(cut)))
    assert half.counters.events_applied == 200
    started = time.monotonic()
    paced = replay_log(log, tmp_path / "paced", ReplayOptions(pace=8.0))
    # 4 s of event time at 8x take at least about 0.5 s (a lower bound, not a timing target)
    assert time.monotonic() - started >= 0.45
    assert paced.counters.events_applied == 400


@pytest.mark.parametrize("graph_name", ["random", "les_miserables", "karate"])
def test_audit_measured_error_agrees_with_networkx_and_respects_the_bound(graph_name: str, tmp_path: Path) -> None:
    if graph_name == "random":
        stream = Stream()
        stream.extend(np.random.default_rng(17), 8_000, n_nodes=500)
    else:
        g = nx.les_miserables_graph() if graph_name == "les_miserables" else nx.karate_club_graph()
        stream = Stream()
        for u, v, data in g.edges(data=True):
            w = float(data.get("weight", 1.0))
            for s, d in ((str(u), str(v)), (str(v), str(u))):
                stream.records.append((s.encode(), json.dumps({"op": "insert", "src": s, "dst": d, "weight": w}).encode()))
                stream.edges[(s, d)] = w
                stream.nodes.update((s, d))
    log = tmp_path / "events.jsonl"
    _write_log(log, stream)
    summary = replay_log(log, tmp_path / "snaps", ReplayOptions(tolerance=TOLERANCE))
    result = audit_snapshot(summary.snapshot)
    prof = result["profiles"]["global"]
    ours = _scores(summary.snapshot)
    ref = stream.reference_scores()
    independent_l1 = sum(abs(ours[n] - ref[n]) for n in ref)
    # NetworkX (tol 1e-13) and the audit's exact solve agree far below the errors measured here
    assert abs(prof["l1"] - independent_l1) <= 1e-9
    assert prof["l1"] <= prof["certified_bound"] <= TOLERANCE
    assert result["ok"] and prof["within_bound"] and prof["nodes_within_bounds"]
    assert prof["relative_error_certified"] <= prof["rtol"] == 1e-3
    # the per-node check, redone here against NetworkX: every node within its published bound
    table = pq.read_table(summary.snapshot / "scores.parquet").to_pylist()
    assert all(abs(r["score"] - ref[r["node"]]) <= r["error_bound"] + 1e-12 for r in table)
    assert prof["top_k_overlap"] >= 0.9


def _corrupt_one_score(snap: Path) -> None:
    """Inject a fault: raise the best node's score and re-seal the checksum, so only the audit can notice."""
    table = pq.read_table(snap / "scores.parquet")
    scores = table["score"].to_numpy().copy()
    best = int(np.argmax(scores))
    scores[best] *= 1.01
    table = table.set_column(table.column_names.index("score"), "score", pa.array(scores))
    pq.write_table(table, snap / "scores.parquet")
    manifest = json.loads((snap / "manifest.json").read_text())
    manifest["files"]["scores.parquet"] = hashlib.sha256((snap / "scores.parquet").read_bytes()).hexdigest()
    (snap / "manifest.json").write_text(json.dumps(manifest))


def test_an_injected_fault_makes_the_audit_fail(random_log, tmp_path: Path) -> None:
    log, _ = random_log
    summary = replay_log(log, tmp_path / "snaps")
    assert _cli("audit", str(tmp_path / "snaps")).returncode == 0
    _corrupt_one_score(summary.snapshot)
    proc = _cli("audit", str(tmp_path / "snaps"), "--json")
    assert proc.returncode == 1
    report = json.loads(proc.stdout)
    prof = report["profiles"]["global"]
    assert report["ok"] is False and prof["nodes_within_bounds"] is False
    best = max(_scores(summary.snapshot).items(), key=lambda kv: kv[1])[0]
    assert prof["worst_node"] == best and prof["worst_error"] > prof["worst_error_bound"]


def test_a_tampered_file_fails_its_checksum_in_the_audit(random_log, tmp_path: Path) -> None:
    log, _ = random_log
    summary = replay_log(log, tmp_path / "snaps")
    edges = summary.snapshot / "edges.parquet"
    edges.write_bytes(edges.read_bytes()[:-10] + b"0123456789")
    proc = _cli("audit", str(tmp_path / "snaps"))
    assert proc.returncode == 1
    assert "sha256" in proc.stderr


def test_top_and_score_read_the_newest_snapshot(random_log, tmp_path: Path) -> None:
    log, _ = random_log
    summary = replay_log(log, tmp_path / "snaps")
    scores = _scores(summary.snapshot)
    best = sorted(scores.items(), key=lambda kv: (-kv[1], kv[0]))[:5]
    top = json.loads(_cli("top", str(tmp_path / "snaps"), "-k", "5", "--json").stdout)
    assert [(r["node"], r["score"]) for r in top["nodes"]] == best
    proc = _cli("score", str(tmp_path / "snaps"), best[0][0], "no-such-node", "--json")
    assert proc.returncode == 1  # one node is unknown
    got = json.loads(proc.stdout)["nodes"]
    assert [(r["node"], r["score"]) for r in got] == [best[0], ("no-such-node", None)]
    assert 0 < got[0]["error_bound"] <= 1e-3 * best[0][1] and got[1]["error_bound"] is None
    status = _cli("status", str(tmp_path / "snaps"))
    assert status.returncode == 0 and "(within rtol)" in status.stdout
    assert f"source: file {Path(log).resolve()}" in status.stdout


def test_the_demo_runs_end_to_end_and_leaves_its_files(tmp_path: Path) -> None:
    proc = _cli("demo", "--out", str(tmp_path / "demo"))
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = tmp_path / "demo"
    for name in ("top-movers.png", "error-vs-bound.png"):
        png = (out / name).read_bytes()
        assert png.startswith(b"\x89PNG") and len(png) > 10_000
    audits = json.loads((out / "audit.json").read_text())
    assert len(audits) >= 3 and all(a["ok"] for a in audits)
    assert {"global", "platform-team"} <= set(audits[-1]["profiles"])
    assert str(out / "top-movers.png") in proc.stdout


def test_a_csv_log_with_iso_times_and_bad_cells(tmp_path: Path) -> None:
    """CSV with the header op,src,dst,weight,ts: bad cells are rejects with their line, the rest applies."""
    log = tmp_path / "events.csv"
    log.write_text("op,src,dst,weight,ts\n"
                   "insert,a,b,1,\n"
                   "insert,b,c,heavy,\n"
                   "insert,b,a,2,2024-01-01T00:00:00Z\n"
                   "delete,a,b,,\n"
                   "insert,c,a,1,yesterday\n")
    summary = replay_log(log, tmp_path / "snaps")
    assert (summary.counters.events_applied, summary.counters.events_rejected) == (3, 2)
    rejects = [json.loads(line) for line in (tmp_path / "snaps" / "rejects.jsonl").read_text().splitlines()]
    assert [r["line"] for r in rejects] == [3, 6]
    assert "heavy" in rejects[0]["reason"] and "ISO-8601" in rejects[1]["reason"]
    stream = Stream(edges={("b", "a"): 2.0}, nodes={"a", "b"})  # c appears only in rejected lines
    check_snapshot_against(stream, summary.snapshot)


def test_row_count_hint_reads_the_parquet_footer_only(random_log, tmp_path: Path) -> None:
    from ranktide.stream.logs import row_count_hint

    path, _ = random_log
    table = pa.table({"op": ["insert"] * 3, "src": ["a", "b", "c"], "dst": ["b", "c", "a"]})
    pq.write_table(table, tmp_path / "log.parquet")
    assert row_count_hint(tmp_path / "log.parquet") == 3
    assert row_count_hint(path) is None  # JSON Lines: unknown without reading it
    (tmp_path / "broken.parquet").write_bytes(b"not parquet")
    assert row_count_hint(tmp_path / "broken.parquet") is None  # the replay then reports the bad file
