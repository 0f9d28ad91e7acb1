"""``ranktide replay`` end to end on a generated log with malformed lines.

Outside references: NetworkX ``pagerank`` (global, and ``personalization=``
for the seeded profiles) on the final graph of an independent dict model of
the log's valid events (``GraphModel``); the event rules and the snapshot
layout of the design notes (sections 5 and 6) for what counts as valid, as a
no-op and as a reject, and for what the snapshot holds.

The log (fixed seed, 30,000 lines) mixes inserts with and without weight and
ts (milliseconds or ISO-8601), re-weights, re-deliveries with the same weight
(no-ops), deletes of present and missing edges (no-ops), seeds on a profile
(set, re-set, removed), node ids given as JSON numbers as well as strings, a
valid id of exactly 1024 characters, skewed sources so that some nodes have
more than 64 out-edges, blank lines (skipped, not counted), and malformed
lines of every kind listed in ``MALFORMED``.
"""

from __future__ import annotations

import hashlib
import json
import math
import subprocess
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from reference_helpers import GraphModel, l1_distance, nx_pagerank
from ranktide.replay.replay import ReplayOptions, replay_log
from ranktide.solver import GLOBAL

LINES = 30_000
TOLERANCE = 1e-9
LOG_PROFILE = "trusted"
FILE_PROFILE = "team"
FILE_SEEDS = {"u3": 2.0, "u7": 1.0, "101": 0.5, "u40": 1.0}
LONG_ID = "L" * 1024  # the longest valid id (Limits.max_id_length)

#: one malformed line per kind, with a word its reject reason must contain
MALFORMED: list[tuple[str, str]] = [
    ('{"op": "insert", "src": "u1", "dst": "u2"', "JSON"),
    ("this is not json", "JSON"),
    ('{"op": "insert", "src": "u1", "dst": "u2",}', "JSON"),
    ('["insert", "u1", "u2"]', "JSON"),
    ('{"op": "upsert", "src": "u1", "dst": "u2"}', "op"),
    ('{"op": "remove", "src": "u1", "dst": "u2"}', "op"),
    ('{"src": "u1", "dst": "u2", "weight": 1.0}', "op"),
    ('{"op": "insert", "dst": "u2"}', "src"),
    ('{"op": "delete", "src": "u1"}', "dst"),
    ('{"op": "seed", "node": "u1", "weight": 1.0}', "profile"),
    ('{"op": "seed", "profile": "trusted", "weight": 1.0}', "node"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": -1.5}', "weight"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": 0}', "weight"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": NaN}', "weight"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": Infinity}', "weight"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": "2.0"}', "weight"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "weight": true}', "weight"),
    ('{"op": "seed", "profile": "trusted", "node": "u1", "weight": -1.0}', "weight"),
    ('{"op": "insert", "src": true, "dst": "u2"}', "src"),
    ('{"op": "insert", "src": "u1", "dst": [1, 2]}', "dst"),
    ('{"op": "delete", "src": {"id": 1}, "dst": "u2"}', "src"),
    ('{"op": "seed", "profile": "trusted", "node": false, "weight": 1.0}', "node"),
    (json.dumps({"op": "insert", "src": "x" * 1025, "dst": "u2"}), "src"),
    (json.dumps({"op": "insert", "src": "u1", "dst": "y" * 3000}), "dst"),
    (json.dumps({"op": "seed", "profile": "p" * 1025, "node": "u1", "weight": 1.0}), "profile"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "ts": "yesterday"}', "ts"),
    ('{"op": "insert", "src": "u1", "dst": "u2", "ts": true}', "ts"),
]


@dataclass
class GeneratedLog:
    """A log and what an independent reading of it expects."""

    path: Path
    model: GraphModel = field(default_factory=GraphModel)
    applied: int = 0
    noop: int = 0
    rejects: list[tuple[int, int, str]] = field(default_factory=list)  # line, byte offset, reason word


def write_log(path: Path, seed: int = 20261201) -> GeneratedLog:
    rng = np.random.default_rng(seed)
    names = [f"u{i}" for i in range(1200)] + [f"café-{i}" for i in range(20)] + [LONG_ID]
    numeric = list(range(100, 160))  # ids also written as JSON numbers
    pool = names + [str(i) for i in numeric]
    skew = 1.0 / np.arange(1, len(pool) + 1) ** 1.1
    pairs = iter(rng.choice(len(pool), size=(LINES, 2), p=skew / skew.sum()).tolist())
    out = GeneratedLog(path)
    model = out.model
    known: list[tuple[str, str]] = []
    lines: list[str] = []
    offset = 0

    def node_json(name: str):
        return int(name) if name.isdigit() and rng.random() < 0.5 else name

    def valid(record: dict, changed: bool) -> str:
        out.applied += 1
        out.noop += not changed
        return json.dumps(record, ensure_ascii=False)

    malformed_count = 0
    while len(lines) < LINES:
        roll = rng.random()
        if roll < 0.01:
            line = ""
        elif roll < 0.04:
            line, word = MALFORMED[malformed_count % len(MALFORMED)]
            malformed_count += 1
            out.rejects.append((len(lines) + 1, offset, word))
        elif roll < 0.07:
            node = str(rng.choice(pool[:300]))
            w = float(rng.choice([0.0, 1.0, 2.5, np.round(rng.uniform(0.1, 5), 2)]))
            changed = model.seed(LOG_PROFILE, node, w)
            line = valid({"op": "seed", "profile": LOG_PROFILE, "node": node_json(node), "weight": w}, changed)
        elif roll < 0.22 and known:
            u, v = known[rng.integers(len(known))]
            if rng.random() < 0.6:
                line = valid({"op": "delete", "src": node_json(u), "dst": node_json(v)}, model.delete(u, v))
            else:  # re-delivery (same weight: a no-op) or re-weight of an edge seen before
                w = model.edges.get((u, v), 1.0) if rng.random() < 0.5 else float(rng.choice([1.0, 3.0]))
                line = valid({"op": "insert", "src": node_json(u), "dst": node_json(v), "weight": w},
                             model.insert(u, v, w))
        else:
            u, v = (pool[i] for i in next(pairs))
            if roll < 0.27:  # deletes of (mostly) missing edges
                line = valid({"op": "delete", "src": node_json(u), "dst": node_json(v)}, model.delete(u, v))
            else:
                record: dict = {"op": "insert", "src": node_json(u), "dst": node_json(v)}
                kind = rng.random()
                if kind < 0.15:
                    w = 1.0  # weight omitted: the default
                elif kind < 0.25:
                    w = float(rng.integers(1, 5))
                    record["weight"] = int(w)
                else:
                    w = float(rng.choice([0.5, 1.0, 2.0, np.round(rng.uniform(0.1, 10), 3)]))
                    record["weight"] = w
                ts_kind = rng.random()
                if ts_kind < 0.3:
                    record["ts"] = 1_764_590_000_000 + len(lines)
                elif ts_kind < 0.4:
                    record["ts"] = "2026-12-01T10:00:00Z"
                known.append((u, v))
                line = valid(record, model.insert(u, v, w))
        lines.append(line)
        offset += len(line.encode("utf-8")) + 1
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert malformed_count >= 10 * len(MALFORMED)
    return out


def write_seeds(path: Path) -> Path:
    """The seeds file of ``--personalization``: one node per line, optionally ``node,weight``."""
    lines = [f"{node},{w}" if w != 1.0 else node for node, w in FILE_SEEDS.items()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(["ranktide", *args], capture_output=True, text=True, timeout=300)


def snapshot_dir(root: Path) -> Path:
    found = sorted(root.glob("snap-*"))
    assert len(found) == 1, found
    return found[0]


def read_scores(snapshot: Path) -> dict[str, dict[str, float]]:
    table = pq.read_table(snapshot / "scores.parquet").to_pydict()
    out: dict[str, dict[str, float]] = {}
    for node, profile, score in zip(table["node"], table["profile"], table["score"]):
        assert node not in out.setdefault(profile, {})
        out[profile][node] = score
    return out


def read_edges(snapshot: Path) -> dict[tuple[str, str], float]:
    table = pq.read_table(snapshot / "edges.parquet").to_pydict()
    edges = {(u, v): w for u, v, w in zip(table["src"], table["dst"], table["weight"])}
    assert len(edges) == len(table["src"])
    return edges


@pytest.fixture(scope="module")
def replayed(tmp_path_factory: pytest.TempPathFactory) -> tuple[GeneratedLog, Path, Path]:
    """The log, replayed once by the console script and once by ``replay_log``."""
    base = tmp_path_factory.mktemp("replay")
    log = write_log(base / "events.jsonl")
    seeds = write_seeds(base / "team.txt")
    model = log.model
    model.touch(*FILE_SEEDS)
    model.seeds[FILE_PROFILE] = dict(FILE_SEEDS)
    cli_root, api_root = base / "cli", base / "api"
    done = run_cli("replay", str(log.path), "--out", str(cli_root), "--tolerance", str(TOLERANCE),
                   "--personalization", f"{FILE_PROFILE}={seeds}", "--quiet")
    assert done.returncode == 0, done.stderr
    replay_log(log.path, api_root, ReplayOptions(tolerance=TOLERANCE, personalizations={FILE_PROFILE: seeds}))
    return log, cli_root, api_root


def test_scores_match_networkx_on_the_true_final_graph(replayed: tuple[GeneratedLog, Path, Path]) -> None:
    log, cli_root, _ = replayed
    snapshot = snapshot_dir(cli_root)
    manifest = json.loads((snapshot / "manifest.json").read_text())
    scores = read_scores(snapshot)
    assert set(scores) == {GLOBAL, LOG_PROFILE, FILE_PROFILE}
    assert set(scores[GLOBAL]) == set(log.model.nodes)
    assert LONG_ID in scores[GLOBAL] and "café-3" in scores[GLOBAL] and "101" in scores[GLOBAL]
    for profile, by_node in scores.items():
        reference = nx_pagerank(log.model, profile)  # NetworkX pagerank, personalization for seeded profiles
        bound = manifest["certified_bound"][profile]
        assert bound <= TOLERANCE, profile
        assert math.isclose(sum(by_node.values()), 1.0, abs_tol=1e-12), profile
        assert l1_distance(by_node, reference) <= bound + 1e-11, profile


def test_edges_hold_exactly_the_final_edge_set(replayed: tuple[GeneratedLog, Path, Path]) -> None:
    log, cli_root, _ = replayed
    edges = read_edges(snapshot_dir(cli_root))
    assert edges == log.model.edges
    # the log reaches the engine's O(1) rescale repair: some node has more than 64 out-edges
    assert max(sum(1 for u, _ in edges if u == x) for x in ("u0", "u1")) > 64


def test_manifest_counts_and_checksums(replayed: tuple[GeneratedLog, Path, Path]) -> None:
    log, cli_root, _ = replayed
    snapshot = snapshot_dir(cli_root)
    manifest = json.loads((snapshot / "manifest.json").read_text())
    assert manifest["events_rejected"] == len(log.rejects)
    assert manifest["events_applied"] == log.applied
    assert manifest["events_noop"] == log.noop
    assert isinstance(manifest["format"], int)
    assert (manifest["damping"], manifest["tolerance"]) == (0.85, TOLERANCE)
    for name in ("scores.parquet", "edges.parquet"):
        assert manifest["files"][name] == hashlib.sha256((snapshot / name).read_bytes()).hexdigest()


def test_rejects_file_names_every_malformed_line(replayed: tuple[GeneratedLog, Path, Path]) -> None:
    log, cli_root, _ = replayed
    records = [json.loads(x) for x in (cli_root / "rejects.jsonl").read_text(encoding="utf-8").splitlines()]
    assert [r["line"] for r in records] == [line for line, _, _ in log.rejects]
    assert [r["offset"] for r in records] == [offset for _, offset, _ in log.rejects]
    for record, (line, _, word) in zip(records, log.rejects):
        assert word.lower() in record["reason"].lower(), (line, record["reason"])


def test_two_replays_are_byte_identical(replayed: tuple[GeneratedLog, Path, Path]) -> None:
    """The console script and ``replay_log`` in another process write the same files."""
    _, cli_root, api_root = replayed
    a, b = snapshot_dir(cli_root), snapshot_dir(api_root)
    for name in ("scores.parquet", "edges.parquet"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    manifest_a = json.loads((a / "manifest.json").read_text())
    manifest_b = json.loads((b / "manifest.json").read_text())
    assert manifest_a.pop("created_at") and manifest_b.pop("created_at")
    assert manifest_a == manifest_b


def test_settling_every_micro_batch_reaches_the_same_scores(
    replayed: tuple[GeneratedLog, Path, Path], tmp_path: Path
) -> None:
    """As the live service does: settle after every 1,000 events (NetworkX pagerank)."""
    log, _, _ = replayed
    options = ReplayOptions(tolerance=TOLERANCE, micro_batch=1000,
                            personalizations={FILE_PROFILE: write_seeds(tmp_path / "team.txt")})
    replay_log(log.path, tmp_path / "out", options)
    scores = read_scores(snapshot_dir(tmp_path / "out"))
    for profile, by_node in scores.items():
        assert l1_distance(by_node, nx_pagerank(log.model, profile)) <= TOLERANCE + 1e-11, profile


def test_missing_log_exits_non_zero_with_a_clear_message(tmp_path: Path) -> None:
    missing = tmp_path / "no-such-log.jsonl"
    done = run_cli("replay", str(missing), "--out", str(tmp_path / "out"))
    assert done.returncode != 0
    assert str(missing) in done.stderr
    assert any(words in done.stderr.lower() for words in ("no such", "not found", "does not exist"))
    assert "Traceback" not in done.stderr
    assert not list((tmp_path / "out").glob("snap-*"))
