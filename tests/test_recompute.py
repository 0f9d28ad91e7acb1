"""``ranktide recompute`` (local engine), ``audit --against`` and the service's periodic recompute.

References: NetworkX ``pagerank`` and the engine's exact SciPy solve (see
:mod:`recompute_helpers`); NetworkX on the true final graph of a stream
(:mod:`stream_helpers`) for the bootstrap.
"""

from __future__ import annotations

import hashlib
import json
import socket
import sys
import time
import urllib.request
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from recompute_helpers import check_against_references, make_graph, write_tables
from stream_helpers import Stream, check_snapshot_against, newest_snapshot, ranktide

from ranktide.stream.snapshots import load_snapshot


def _run(*args: str, timeout: float = 180) -> tuple[int, str, str]:
    proc = ranktide(*args)
    out, err = proc.communicate(timeout=timeout)
    return proc.returncode, out.decode(), err.decode()


def test_local_recompute_matches_networkx_and_the_exact_solve(tmp_path: Path) -> None:
    graph = make_graph()
    edges, nodes, seeds = write_tables(graph, tmp_path / "in")
    code, out, err = _run("recompute", str(edges), "--nodes", str(nodes), "--out", str(tmp_path / "rec"),
                          "--personalization", f"trusted={seeds}", "--rtol", "1e-8", "--certified-top", "5")
    assert code == 0, err
    assert "iteration 1:" in err  # per-iteration progress on stderr
    snap = newest_snapshot(tmp_path / "rec")
    manifest = json.loads((snap / "manifest.json").read_text())
    assert manifest["source"] == "recompute" and manifest["engine"] == "local"
    assert manifest["nodes"] == len(graph.nodes) and manifest["edges"] == len(graph.edges)
    assert manifest["iterations"] > 1
    assert manifest["profiles"]["global"]["rtol_reached"] <= 1e-8
    check_against_references(graph, snap, within=1e-9)
    # the snapshot loads, and the in-memory audit (exact solve to 1e-12) finds every node within its bound
    assert load_snapshot(snap).ranker.engine.n_edges == len(graph.edges)
    code, out, err = _run("audit", str(tmp_path / "rec"))
    assert code == 0, out + err


def test_recompute_rejects_bad_tables_in_one_line(tmp_path: Path) -> None:
    twice = tmp_path / "twice.parquet"
    pq.write_table(pa.table({"src": ["a", "a"], "dst": ["b", "b"], "weight": [1.0, 2.0]}), twice)
    code, _, err = _run("recompute", str(twice), "--out", str(tmp_path / "o"))
    assert code == 2 and "more than once" in err and "Traceback" not in err
    nodst = tmp_path / "nodst.parquet"
    pq.write_table(pa.table({"src": ["a"], "to": ["b"]}), nodst)
    code, _, err = _run("recompute", str(nodst), "--out", str(tmp_path / "o"))
    assert code == 2 and "no column 'dst'" in err and "Traceback" not in err
    code, _, err = _run("recompute", str(tmp_path / "missing"), "--out", str(tmp_path / "o"))
    assert code == 2 and "no such file" in err
    assert not (tmp_path / "o").exists() or not any((tmp_path / "o").iterdir())


def test_missing_pyspark_names_the_extra(monkeypatch: pytest.MonkeyPatch) -> None:
    from ranktide.replay.recompute import RecomputeError
    from ranktide.replay.spark_recompute import spark_session

    monkeypatch.setitem(sys.modules, "pyspark", None)
    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    with pytest.raises(RecomputeError, match=r"ranktide\[spark\]"):
        with spark_session(None, {}):
            pass


def _write_lines(path: Path, records: list[tuple[bytes, bytes]]) -> int:
    data = b"".join(value + b"\n" for _, value in records)
    with open(path, "ab") as fh:
        fh.write(data)
    return len(data)


def test_bootstrap_from_an_edge_table_then_run_and_replay_consume_the_rest_once(tmp_path: Path) -> None:
    rng = np.random.default_rng(21)
    head = Stream()
    head.extend(rng, 2000, n_nodes=400)
    log = tmp_path / "events.jsonl"
    offset = _write_lines(log, head.records)
    # the team's table: the graph after the first 2,000 records, and every node seen so far
    table = tmp_path / "table.parquet"
    items = sorted(head.edges.items())
    pq.write_table(pa.table({"src": [s for (s, _), _ in items], "dst": [d for (_, d), _ in items],
                             "weight": [w for _, w in items]}), table)
    nodes = tmp_path / "nodes.parquet"
    pq.write_table(pa.table({"node": sorted(head.nodes)}), nodes)
    root = tmp_path / "live"
    positions = json.dumps({"files": {str(log.resolve()): {"offset": offset, "line": len(head.records)}}})
    code, _, err = _run("recompute", str(table), "--nodes", str(nodes), "--out", str(root), "--positions", positions)
    assert code == 0, err
    check_snapshot_against(head, newest_snapshot(root))  # NetworkX on the head's true graph
    # the stream goes on; the service starts from the recomputed snapshot and reads only the rest
    full = Stream(records=list(head.records), edges=dict(head.edges), nodes=set(head.nodes), malformed=head.malformed)
    full.extend(rng, 1500, n_nodes=400)
    _write_lines(log, full.records[len(head.records):])
    boot = newest_snapshot(root)
    code, _, err = _run("replay", str(log), "--from", str(boot), "--out", str(tmp_path / "replayed"), "--quiet")
    assert code == 0, err
    manifest = check_snapshot_against(full, newest_snapshot(tmp_path / "replayed"))
    assert manifest["events_applied"] + manifest["events_rejected"] == len(full.records) - len(head.records)
    code, _, err = _run("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end",
                        "--quiet")
    assert code == 0, err
    manifest = check_snapshot_against(full, newest_snapshot(root))  # NetworkX on the full stream's graph
    assert manifest["events_applied"] + manifest["events_rejected"] == len(full.records) - len(head.records)


def _inject(snap: Path, node: str, factor: float) -> None:
    """Multiply one global score by ``factor`` and re-sign the file, so only the audit can catch it."""
    table = pq.read_table(snap / "scores.parquet")
    hit = pc.and_(pc.equal(table["node"], node), pc.equal(table["profile"], "global")).to_numpy(zero_copy_only=False)
    scores = table["score"].to_numpy().copy()
    scores[hit] *= factor
    table = table.set_column(table.schema.get_field_index("score"), "score", pa.array(scores))
    pq.write_table(table, snap / "scores.parquet")
    manifest = json.loads((snap / "manifest.json").read_text())
    manifest["files"]["scores.parquet"] = hashlib.sha256((snap / "scores.parquet").read_bytes()).hexdigest()
    (snap / "manifest.json").write_text(json.dumps(manifest))


def test_audit_against_a_recompute_passes_then_fails_on_an_injected_wrong_score(tmp_path: Path) -> None:
    rng = np.random.default_rng(8)
    stream = Stream()
    stream.extend(rng, 3000, n_nodes=300)
    log = tmp_path / "events.jsonl"
    _write_lines(log, stream.records)
    code, _, err = _run("replay", str(log), "--out", str(tmp_path / "live"), "--quiet")
    assert code == 0, err
    code, _, err = _run("recompute", str(tmp_path / "live"), "--out", str(tmp_path / "rec"), "--rtol", "1e-6",
                        "--quiet")
    assert code == 0, err
    code, out, err = _run("audit", str(tmp_path / "live"), "--against", str(tmp_path / "rec"))
    assert code == 0, out + err
    assert "every node within both bounds" in out
    _inject(newest_snapshot(tmp_path / "live"), "v7", 1.01)  # 1 %: ten times the contract
    code, out, err = _run("audit", str(tmp_path / "live"), "--against", str(tmp_path / "rec"), "--json")
    assert code == 1
    result = json.loads(out)
    assert result["profiles"]["global"]["worst_node"] == "v7"
    assert "node v7" in err and "Traceback" not in err


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _metrics(port: int) -> str:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            return resp.read().decode()
    except OSError:
        return ""


def test_service_recomputes_periodically_and_exports_the_drift(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    stream = Stream()
    stream.extend(rng, 3000, n_nodes=300)
    log = tmp_path / "events.jsonl"
    _write_lines(log, stream.records)
    root = tmp_path / "out"
    port = _free_port()
    proc = ranktide("run", "--source", f"file:{log}", "--out", str(root), "--metrics", f"127.0.0.1:{port}",
                    "--snapshot-interval", "0.3", "--recompute-interval", "0.5")
    deadline = time.monotonic() + 120
    text = ""
    while time.monotonic() < deadline and "ranktide_recompute_ok 1" not in text:
        assert proc.poll() is None, proc.communicate()[1].decode()[-2000:]
        text = _metrics(port)
        time.sleep(0.1)
    assert "ranktide_recompute_ok 1" in text, text
    assert 'ranktide_recompute_error{profile="global"}' in text
    drift = float(text.split('ranktide_recompute_error{profile="global"} ')[1].split()[0])
    assert 0.0 <= drift < 1e-2
    status = ranktide("status", str(root))
    out, _ = status.communicate(timeout=60)
    assert "last full recompute (local)" in out.decode() and "measured drift of global" in out.decode()
    proc.terminate()
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err.decode()[-2000:]
    assert "full recompute of snap-" in err.decode()


def test_recompute_settings_come_from_file_environment_and_options(tmp_path: Path) -> None:
    from ranktide.stream.config import ConfigError, load_config

    conf = tmp_path / "ranktide.toml"
    conf.write_text('source = "file:x.jsonl"\nrecompute_interval = 600\nrecompute_engine = "spark"\n')
    cfg = load_config(conf, env={})
    assert (cfg.recompute_interval, cfg.recompute_engine) == (600.0, "spark")
    cfg = load_config(conf, env={"RANKTIDE_RECOMPUTE_INTERVAL": "30", "RANKTIDE_RECOMPUTE_ENGINE": "local"})
    assert (cfg.recompute_interval, cfg.recompute_engine) == (30.0, "local")
    cfg = load_config(conf, env={"RANKTIDE_RECOMPUTE_INTERVAL": "30"}, overrides={"recompute_interval": 0})
    assert cfg.recompute_interval == 0.0
    with pytest.raises(ConfigError, match="recompute_engine"):
        load_config(conf, env={"RANKTIDE_RECOMPUTE_ENGINE": "dask"})
    with pytest.raises(ConfigError, match="recompute_interval"):
        load_config(conf, env={"RANKTIDE_RECOMPUTE_INTERVAL": "-1"})
