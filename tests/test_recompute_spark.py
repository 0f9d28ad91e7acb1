"""``ranktide recompute --engine spark`` and ``audit --engine spark``: Apache Spark in local mode.

One SparkSession (local[2]) serves the module. References: NetworkX
``pagerank`` and the engine's exact SciPy solve (:mod:`recompute_helpers`),
and the local recompute, which iterates the same way and must stop at the same
iteration with the same figures.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Iterator

import numpy as np
import pyarrow.parquet as pq
import pytest

from recompute_helpers import SEEDS, check_against_references, make_graph, write_tables
from stream_helpers import newest_snapshot, ranktide

pyspark = pytest.importorskip("pyspark", reason="pyspark is in the test extra: pip install -e '.[test]'")

from ranktide.replay.audit import run_audit_against  # noqa: E402
from ranktide.replay.recompute import RecomputeInput, Settings, recompute_local, resolve_input, settings_for  # noqa: E402
from ranktide.stream.logs import read_seeds_file  # noqa: E402
from ranktide.replay.spark_recompute import recompute_spark  # noqa: E402
from ranktide.solver.recompute import Targets  # noqa: E402
from ranktide.stream.snapshots import load_snapshot  # noqa: E402

pytestmark = pytest.mark.spark


@pytest.fixture(scope="module")
def spark() -> Iterator[object]:
    from pyspark.sql import SparkSession

    session = (SparkSession.builder.master("local[2]").appName("ranktide tests")
               .config("spark.sql.shuffle.partitions", "2").config("spark.sql.adaptive.enabled", "false")
               .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false").getOrCreate())
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()


def _sorted_scores(snap: Path):
    return pq.read_table(snap / "scores.parquet").sort_by([("profile", "ascending"), ("node", "ascending")])


def test_spark_recompute_of_part_files_matches_networkx_the_exact_solve_and_the_local_engine(
        spark, tmp_path: Path) -> None:
    graph = make_graph()
    edges, nodes, seeds = write_tables(graph, tmp_path / "in", parts=3)
    inp = RecomputeInput(edges=str(edges), nodes=str(nodes), seeds={"trusted": read_seeds_file(seeds)})
    settings = Settings(Targets(rtol=1e-8, certified_top=5), positions={"files": {}})
    snap = recompute_spark(spark, inp, tmp_path / "spark", settings, progress=False)
    manifest = json.loads((snap / "manifest.json").read_text())
    assert manifest["source"] == "recompute" and manifest["engine"] == "spark"
    assert manifest["nodes"] == len(graph.nodes) and manifest["edges"] == len(graph.edges)
    assert {p.name for p in snap.iterdir()} == {"scores.parquet", "edges.parquet", "seeds.parquet", "manifest.json"}
    check_against_references(graph, snap, within=1e-9)
    seeds_written = {r["node"]: r["weight"] for r in pq.read_table(snap / "seeds.parquet").to_pylist()}
    assert seeds_written == SEEDS
    # the in-memory engine iterates the same way: same stop, same scores and bounds
    local = recompute_local(inp, tmp_path / "local", settings, progress=False)
    local_manifest = json.loads((local / "manifest.json").read_text())
    assert manifest["iterations"] == local_manifest["iterations"]
    a, b = _sorted_scores(snap), _sorted_scores(local)
    assert a["node"].equals(b["node"]) and a["profile"].equals(b["profile"])
    np.testing.assert_allclose(a["score"].to_numpy(), b["score"].to_numpy(), rtol=0, atol=1e-14)
    np.testing.assert_allclose(a["error_bound"].to_numpy(), b["error_bound"].to_numpy(), rtol=1e-6)
    for name in ("global", "trusted"):
        for key in ("rtol_reached", "l1_bound", "certified_threshold", "unlisted_bound", "estimate_sum"):
            assert manifest["profiles"][name][key] == pytest.approx(local_manifest["profiles"][name][key],
                                                                    rel=1e-6, abs=1e-300)
    # a snapshot written by Spark loads into the engine, and the in-memory audit passes it node by node
    assert load_snapshot(snap).ranker.engine.n_nodes == len(graph.nodes)
    proc = ranktide("audit", str(tmp_path / "spark"))
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, (out + err).decode()


def test_audit_engine_spark_recomputes_a_snapshot_and_passes_it(spark, tmp_path: Path, capsys) -> None:
    graph = make_graph(seed=9)
    edges, nodes, seeds = write_tables(graph, tmp_path / "in", parts=2)
    inp = resolve_input(str(edges), str(nodes))
    inp.seeds["trusted"] = read_seeds_file(seeds)
    live = recompute_local(inp, tmp_path / "live", settings_for(inp, 1e-3, None, 5, None, None), progress=False)
    code = run_audit_against(tmp_path / "live", None, None, "spark", True,
                             {"rtol": 1e-4, "out": tmp_path / "rec"})
    result = json.loads(capsys.readouterr().out)
    assert code == 0, result
    assert result["recompute_engine"] == "spark" and result["snapshot"] == live.name
    assert all(p["within_bounds"] for p in result["profiles"].values())
    assert newest_snapshot(tmp_path / "rec").is_dir()


def test_spark_rejects_a_pair_listed_twice_and_leaves_no_snapshot(spark, tmp_path: Path) -> None:
    import pyarrow as pa

    from ranktide.replay.recompute import RecomputeError

    table = tmp_path / "twice.parquet"
    pq.write_table(pa.table({"src": ["a", "b", "a"], "dst": ["b", "c", "b"], "weight": [1.0, 1.0, 2.0]}), table)
    with pytest.raises(RecomputeError, match=r"the pair a -> b is listed 2 times"):
        recompute_spark(spark, RecomputeInput(edges=str(table)), tmp_path / "out", Settings(Targets()),
                        progress=False)
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())
