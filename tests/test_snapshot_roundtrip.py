"""Snapshots: write, load, resume; a corrupted newest snapshot is skipped.

Outside references: NetworkX ``pagerank`` for the scores of the loaded (and
then resumed) engine; the residual definition r = s - (I - d P^T) p / a of
the design notes (section 2), recomputed here with SciPy on an independent
dict model, for "a restart recomputes r exactly from p" (section 6).
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pytest

from reference_helpers import (
    GraphModel,
    build_ranker,
    engine_edges,
    event_script,
    exact_residual,
    l1_distance,
    mixed_batch,
    nx_pagerank,
    random_model,
    scores_by_name,
    transition_transpose,
)
from ranktide.solver import Ranker
from ranktide.stream.snapshots import Counters, load_latest, load_snapshot, write_snapshot

TOLERANCE = 1e-8
DAMPING = 0.85


def seeded_ranker(seed: int) -> tuple[Ranker, GraphModel]:
    model = random_model(np.random.default_rng(seed), n=60, m=220, n_dangling=5, n_isolated=2, n_selfloops=3,
                         seed_profiles={"trusted": 4, "team": 2})
    return build_ranker(event_script(model, np.random.default_rng(seed)), tolerance=TOLERANCE), model


def check_residual_is_exact(ranker: Ranker, model: GraphModel) -> None:
    """The engine's residual equals the one recomputed from p with SciPy (1e-12 relative)."""
    engine = ranker.engine
    names = ranker.node_names().to_pylist()
    PT = transition_transpose(names, model.edges)
    index = {x: i for i, x in enumerate(names)}
    for profile in engine.profiles:
        k = engine.profile_index(profile)
        s = np.zeros(len(names))
        for node, w in model.teleport(profile).items():
            s[index[node]] = w
        r = exact_residual(PT, s, engine.P[k, : len(names)], DAMPING)
        assert np.abs(engine.R[k, : len(names)] - r).sum() <= 1e-12 * max(s.sum(), 1.0), profile


def test_round_trip_keeps_scores_edges_counters_and_recomputes_the_residual(tmp_path: Path) -> None:
    ranker, model = seeded_ranker(3)
    counters = Counters(events_applied=1234, events_noop=56, events_rejected=7)
    positions = {"file": "/logs/events.jsonl", "offset": 98765, "line": 4321}
    path = write_snapshot(tmp_path, ranker, counters, positions)
    loaded = load_snapshot(path)

    assert loaded.counters == counters
    assert loaded.manifest["positions"] == positions
    assert engine_edges(loaded.ranker) == model.edges
    assert set(loaded.ranker.profiles) == set(ranker.profiles)
    for profile in ranker.profiles:
        before, after = scores_by_name(ranker, profile), scores_by_name(loaded.ranker, profile)
        assert set(after) == set(before)
        assert max(abs(after[x] - before[x]) for x in before) <= 1e-12, profile
        assert loaded.ranker.certified_bound(profile) <= TOLERANCE, profile
        assert l1_distance(after, nx_pagerank(model, profile)) <= loaded.ranker.certified_bound(profile) + 1e-12
    check_residual_is_exact(loaded.ranker, model)


def test_loaded_engine_resumes_with_more_events(tmp_path: Path) -> None:
    """After a restart, further inserts, deletes and seeds give NetworkX's scores of the new graph."""
    ranker, model = seeded_ranker(4)
    loaded = load_snapshot(write_snapshot(tmp_path, ranker, Counters(), {})).ranker
    rng = np.random.default_rng(44)
    nodes = list(model.nodes) + ["late1", "late2"]
    events = [("delete", u, v, 1.0) for u, v in list(model.edges)[:30]]
    events += [("insert", str(rng.choice(nodes)), str(rng.choice(nodes)), 2.0) for _ in range(40)]
    events += [("seed", "trusted", "late1", 3.0), ("seed", "team", next(iter(model.seeds["team"])), 0.0)]
    for op, a, b, w in events:
        if op == "insert":
            model.insert(a, b, w)
        elif op == "delete":
            model.delete(a, b)
        else:
            model.seed(a, b, w)
    loaded.apply(mixed_batch(events))
    loaded.settle()
    assert engine_edges(loaded) == model.edges
    for profile in loaded.profiles:
        assert l1_distance(scores_by_name(loaded, profile), nx_pagerank(model, profile)) <= TOLERANCE, profile
    check_residual_is_exact(loaded, model)


def flip_bytes(path: Path) -> None:
    """Invert 16 bytes in the middle of a file."""
    data = bytearray(path.read_bytes())
    middle = len(data) // 2
    data[middle : middle + 16] = bytes(b ^ 0xFF for b in data[middle : middle + 16])
    path.write_bytes(bytes(data))


def test_corrupted_newest_snapshot_is_skipped_with_a_warning(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    ranker, model = seeded_ranker(5)
    older = write_snapshot(tmp_path, ranker, Counters(events_applied=1), {})
    older_scores = scores_by_name(ranker)
    ranker.apply(mixed_batch([("insert", "v1", "v2", 9.0), ("delete", *next(iter(model.edges)), 1.0)]))
    newer = write_snapshot(tmp_path, ranker, Counters(events_applied=3), {})
    assert newer.name > older.name
    flip_bytes(newer / "scores.parquet")

    with caplog.at_level(logging.WARNING, logger="ranktide.snapshots"):
        latest = load_latest(tmp_path)
    assert latest is not None and latest.path == older
    assert latest.counters.events_applied == 1
    loaded = scores_by_name(latest.ranker)
    assert max(abs(loaded[x] - older_scores[x]) for x in older_scores) <= 1e-12
    warnings = [r for r in caplog.records if r.levelno == logging.WARNING and r.name == "ranktide.snapshots"]
    assert len(warnings) == 1
    assert newer.name in warnings[0].getMessage() and "scores.parquet" in warnings[0].getMessage()


def test_an_edge_listed_twice_is_a_clear_error(tmp_path: Path) -> None:
    """A snapshot whose edges file repeats a pair (rewritten, checksums skipped) is refused with the pair."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ranktide.stream.snapshots import SnapshotError

    ranker, _ = seeded_ranker(6)
    snap = write_snapshot(tmp_path, ranker, Counters(), {})
    edges = pq.read_table(snap / "edges.parquet")
    pq.write_table(pa.concat_tables([edges, edges.slice(3, 1)]), snap / "edges.parquet")
    with pytest.raises(SnapshotError, match=r"edges\.parquet: edge \d+ .* is listed twice"):
        load_snapshot(snap, check=False)
