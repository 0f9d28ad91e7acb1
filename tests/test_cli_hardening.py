"""What a user meets first: last records without a newline, outputs that cannot be
written, bad options, malformed CSV rows, help lines and the example configuration.

Every command runs as a child process of the real command line. The checks are
on observable behaviour: exit codes (README: 2 bad input or environment, 3 an
output that cannot be written), one line on stderr without a traceback, and the
events a snapshot counts. Scores are checked against NetworkX ``pagerank`` on
the graph the log implies.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import networkx as nx
import pyarrow.parquet as pq
import pytest

from stream_helpers import newest_snapshot, ranktide

REPO = Path(__file__).resolve().parents[1]
EVENTS = [
    {"op": "insert", "src": "a", "dst": "b"},
    {"op": "insert", "src": "b", "dst": "c", "weight": 2.0},
    {"op": "insert", "src": "c", "dst": "a"},
    {"op": "insert", "src": "c", "dst": "d"},
]


def _lines(events: list[dict]) -> bytes:
    return b"\n".join(json.dumps(e).encode() for e in events)


def _run(*args: str, timeout: float = 120, env: dict | None = None) -> subprocess.CompletedProcess:
    """Run the command line to its end; return the completed process (text output)."""
    proc = ranktide(*args, env=env)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
        raise AssertionError(f"ranktide {' '.join(args)} did not finish in {timeout} s: {err.decode()[-2000:]}")
    return subprocess.CompletedProcess(proc.args, proc.returncode, out.decode(), err.decode())


def _one_line_error(done: subprocess.CompletedProcess, code: int, *words: str) -> str:
    """The run ended with ``code`` and one error line on stderr (no traceback) naming ``words``."""
    assert done.returncode == code, (done.returncode, done.stderr[-3000:])
    assert "Traceback" not in done.stderr, done.stderr[-3000:]
    errors = [ln for ln in done.stderr.splitlines() if "error" in ln.lower()]
    assert len(errors) == 1, done.stderr[-3000:]
    for word in words:
        assert word in errors[0], errors[0]
    return errors[0]


def _networkx_scores(events: list[dict]) -> dict[str, float]:
    """Reference: NetworkX ``pagerank`` of the graph the inserts build."""
    g = nx.DiGraph()
    for e in events:
        g.add_edge(e["src"], e["dst"], weight=e.get("weight", 1.0))
    return nx.pagerank(g, alpha=0.85, tol=1e-13, max_iter=10_000)


def _global_scores(snap: Path) -> dict[str, float]:
    rows = pq.read_table(snap / "scores.parquet").to_pylist()
    return {r["node"]: r["score"] for r in rows if r["profile"] == "global"}


def _manifest(snap: Path) -> dict:
    return json.loads((snap / "manifest.json").read_text())


def _wait_for(predicate, timeout: float = 90.0, what: str = "condition") -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


# ---------------------------------------------------------------- item 3: a last line without newline


def test_run_stop_at_end_applies_a_last_record_without_newline(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))  # no newline after the last record
    root = tmp_path / "snaps"
    done = _run("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end",
                "--quiet", timeout=60)
    assert done.returncode == 0, done.stderr[-3000:]
    snap = newest_snapshot(root)
    assert _manifest(snap)["events_applied"] == len(EVENTS)
    ours, ref = _global_scores(snap), _networkx_scores(EVENTS)
    assert set(ours) == set(ref)
    assert sum(abs(ours[n] - ref[n]) for n in ref) <= 1e-6


def test_a_followed_file_keeps_a_partial_line_until_it_is_complete(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    whole = _lines(EVENTS[:3]) + b"\n"
    last = json.dumps(EVENTS[3]).encode()
    log.write_bytes(whole + last[:10])
    root = tmp_path / "snaps"
    proc = ranktide("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "",
                    "--snapshot-interval", "0.2", "--quiet")

    def covered() -> int:
        if not root.is_dir() or not any(p.name.startswith("snap-") for p in root.iterdir()):
            return -1
        m = _manifest(newest_snapshot(root))
        return m["events_applied"] + m["events_rejected"]

    _wait_for(lambda: covered() == 3, what="a snapshot of the three complete lines")
    assert _manifest(newest_snapshot(root))["events_rejected"] == 0  # the half line was not taken
    with open(log, "ab") as fh:
        fh.write(last[10:])  # complete the record, still without a newline: the file may grow on
    # a followed file never ends: the record waits for its newline
    with open(log, "ab") as fh:
        fh.write(b"\n")
    _wait_for(lambda: covered() == 4, what="a snapshot that includes the completed line")
    proc.terminate()
    assert proc.wait(60) == 0
    snap = newest_snapshot(root)
    assert _manifest(snap)["events_rejected"] == 0
    ref = _networkx_scores(EVENTS)
    ours = _global_scores(snap)
    assert sum(abs(ours[n] - ref[n]) for n in ref) <= 1e-6


def test_replay_applies_a_last_record_without_newline(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    done = _run("replay", str(log), "--out", str(tmp_path / "snaps"), "--quiet")
    assert done.returncode == 0, done.stderr
    assert _manifest(newest_snapshot(tmp_path / "snaps"))["events_applied"] == len(EVENTS)
