"""Shared pieces of the service tests: an event stream with its ground truth, and checks.

The ground truth is kept independently of ranktide: a plain dict of the final
edge set, from which NetworkX computes the reference PageRank.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow.parquet as pq

MALFORMED = [
    b"not json at all",
    b'{"op": "insert", "src": "a"}',
    b'{"op": "insert", "src": "a", "dst": "b", "weight": 0}',
    b'{"op": "insert", "src": "a", "dst": "b", "weight": "NaN"}',
    b'{"op": "teleport", "src": "a", "dst": "b"}',
    b'["insert", "a", "b"]',
    b'{"op": "delete", "src": true, "dst": "b"}',
]


@dataclass
class Stream:
    """Encoded records (JSON bytes, with their Kafka key) and the truth they imply."""

    records: list[tuple[bytes, bytes]] = field(default_factory=list)
    edges: dict[tuple[str, str], float] = field(default_factory=dict)
    nodes: set[str] = field(default_factory=set)
    malformed: int = 0

    def extend(self, rng: np.random.Generator, count: int, n_nodes: int = 1500, bad_share: float = 0.01) -> None:
        """Append ``count`` records: inserts, re-weights, deletes and malformed ones."""
        for _ in range(count):
            if rng.random() < bad_share:
                self.records.append((b"bad", MALFORMED[int(rng.integers(len(MALFORMED)))]))
                self.malformed += 1
                continue
            if self.edges and rng.random() < 0.25:
                keys = list(self.edges)
                src, dst = keys[int(rng.integers(len(keys)))]
                del self.edges[(src, dst)]
                rec = {"op": "delete", "src": src, "dst": dst}
            else:
                src = f"v{int(rng.integers(n_nodes))}"
                dst = f"v{int(rng.pareto(1.5) * 10) % n_nodes}"
                weight = float(rng.choice([1.0, 2.0, 0.5]))
                self.edges[(src, dst)] = weight
                rec = {"op": "insert", "src": src, "dst": dst, "weight": weight}
            self.nodes.update((src, dst))
            # keyed by source node: the events of one edge keep their order in one partition
            self.records.append((src.encode(), json.dumps(rec).encode()))

    def reference_scores(self, damping: float = 0.85) -> dict[str, float]:
        """NetworkX ``pagerank`` on the true final graph (every node seen, isolated ones included)."""
        g = nx.DiGraph()
        g.add_nodes_from(self.nodes)
        g.add_weighted_edges_from((s, d, w) for (s, d), w in self.edges.items())
        return nx.pagerank(g, alpha=damping, tol=REFERENCE_TOL, max_iter=10_000)


#: NetworkX stops when one iteration moves the vector by less than N * tol in L1.
REFERENCE_TOL = 1e-13


def reference_error(n: int, damping: float) -> float:
    """A bound on NetworkX's own L1 error when it stops: the last step, N * tol, times d / (1 - d).

    Power iteration contracts by ``d`` per step, so the distance to the
    solution is at most ``d / (1 - d)`` times the last step. A state certified
    tighter than that (a settle that reaches the rounding floor) is checked
    only to the reference's accuracy.
    """
    return n * REFERENCE_TOL * damping / (1.0 - damping)


def newest_snapshot(root: Path) -> Path:
    dirs = sorted(p for p in Path(root).iterdir() if p.name.startswith("snap-"))
    assert dirs, f"no snapshot under {root}"
    return dirs[-1]


def check_snapshot_against(stream: Stream, snap: Path, tolerance: float | None = None) -> dict:
    """Assert the snapshot's edges are the truth and its scores right by NetworkX.

    Every node's NetworkX score must lie within the node's ``error_bound`` and,
    under the per-node contract, within relative ``rtol``; with ``tolerance``
    the L1 error of the whole vector must be within it too.
    """
    manifest = json.loads((snap / "manifest.json").read_text())
    edges = pq.read_table(snap / "edges.parquet").to_pylist()
    assert {(e["src"], e["dst"]): e["weight"] for e in edges} == stream.edges
    rows = [r for r in pq.read_table(snap / "scores.parquet").to_pylist() if r["profile"] == "global"]
    ours = {r["node"]: r["score"] for r in rows}
    ref = stream.reference_scores(manifest["damping"])
    assert set(ours) == set(ref)
    for r in rows:
        error = abs(r["score"] - ref[r["node"]])
        assert error <= r["error_bound"] + reference_error(len(ref), manifest["damping"]), \
            f"node {r['node']}: error {error} above its bound {r['error_bound']}"
        if manifest.get("rtol"):
            assert error <= manifest["rtol"] * ref[r["node"]], f"node {r['node']}: relative error above rtol"
    if tolerance is not None:
        l1 = sum(abs(ours[n] - ref[n]) for n in ref)
        assert l1 <= tolerance, f"L1 {l1} above tolerance {tolerance}"
    return manifest


def free_port() -> int:
    """A free loopback port for a child's metrics endpoint."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def scrape(port: int) -> dict[str, float]:
    """The child's Prometheus metrics (``{}`` while the endpoint is not up yet)."""
    import urllib.error
    import urllib.request

    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            text = resp.read().decode()
    except (urllib.error.URLError, ConnectionError, TimeoutError):
        return {}
    return {ln.split()[0]: float(ln.split()[1]) for ln in text.splitlines() if ln and ln[0] != "#"}


def wait_for(predicate, timeout: float = 90.0, what: str = "condition") -> None:
    """Poll ``predicate`` until it holds; AssertionError naming ``what`` after ``timeout`` seconds."""
    import time

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def wait_until_counted(proc: subprocess.Popen, port: int, records: int, timeout: float = 180.0) -> None:
    """Until the child on metrics ``port`` has applied or rejected ``records`` records (a generous deadline)."""
    import time

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, "the consumer exited early"
        m = scrape(port)
        if m.get("ranktide_events_applied_total", 0) + m.get("ranktide_events_rejected_total", 0) >= records:
            return
        time.sleep(0.1)
    raise AssertionError(f"the consumer did not take {records} records within {timeout} s")


#: Children started by :func:`ranktide`; ``conftest.py`` kills those still running after each test.
CHILDREN: list[subprocess.Popen] = []


def sigterm_and_check(proc: subprocess.Popen, stream: Stream, root: Path, tolerance: float | None = None) -> dict:
    """SIGTERM ``proc``: it must exit 0 within 10 s leaving a final snapshot that counts every record once."""
    import signal
    import time

    started = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=30)
    assert proc.returncode == 0, err.decode()[-2000:]
    assert time.monotonic() - started < 10
    manifest = check_snapshot_against(stream, newest_snapshot(root), tolerance)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)
    return manifest


def ranktide(*args: str, env: dict | None = None, **kwargs) -> subprocess.Popen:
    """Start the ``ranktide`` command line as a child process."""
    full_env = {**os.environ, **(env or {})}
    proc = subprocess.Popen([sys.executable, "-m", "ranktide.stream.cli", *args], env=full_env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, **kwargs)
    CHILDREN.append(proc)
    return proc


def reap_children() -> None:
    """Kill the children a failed test left running."""
    while CHILDREN:
        proc = CHILDREN.pop()
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
