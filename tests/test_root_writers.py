"""One writer per snapshot root; replay never mixes graphs in a root; the metrics an operator alerts on.

Every command runs as a child process. The lock is a real ``fcntl.flock``
held by a real ``ranktide run``; "dies with the process" is checked with a
real ``kill -9``. Scores are checked against NetworkX ``pagerank`` (see
:mod:`tests.stream_helpers`).
"""

from __future__ import annotations

import json
import math
import os
import signal
import socket
import subprocess
import sys
import urllib.request
from pathlib import Path

import numpy as np

from stream_helpers import Stream, check_snapshot_against, newest_snapshot, ranktide, wait_for

TOLERANCE = 1e-6


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "--log-level", "WARNING", *args],
                          capture_output=True, text=True, timeout=300)


def _log(path: Path, seed: int, count: int = 2_000) -> Stream:
    stream = Stream()
    stream.extend(np.random.default_rng(seed), count, n_nodes=400)
    path.write_bytes(b"".join(value + b"\n" for _, value in stream.records))
    return stream


def _snaps(root: Path) -> list[str]:
    return sorted(p.name for p in root.iterdir() if p.name.startswith("snap-")) if root.is_dir() else []


def _follow(log: Path, root: Path, *extra: str) -> subprocess.Popen:
    """A live ``run`` following ``log`` (no --stop-at-end): it holds ``root`` until stopped."""
    return ranktide("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "",
                    "--snapshot-interval", "0.2", "--tolerance", str(TOLERANCE), *extra)


def _one_line(stderr: str) -> str:
    assert "Traceback" not in stderr, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    return lines[0]


def test_a_second_writer_on_a_live_root_exits_2_naming_the_holder(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    stream = _log(log, 1)
    root = tmp_path / "snaps"
    live = _follow(log, root)
    wait_for(lambda: bool(_snaps(root)), what="the live writer's first snapshot")

    second_run = _cli("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end")
    replay = _cli("replay", str(log), "--out", str(root), "--from", str(root))
    for proc in (second_run, replay):
        assert proc.returncode == 2, proc.stderr
        line = _one_line(proc.stderr)
        assert f"pid {live.pid}" in line and str(root) in line
    demo_out = tmp_path / "demo"
    demo_live = _follow(log, demo_out / "snapshots")
    wait_for(lambda: bool(_snaps(demo_out / "snapshots")), what="a writer in the demo's root")
    demo = _cli("demo", "--out", str(demo_out))
    assert demo.returncode == 2 and f"pid {demo_live.pid}" in _one_line(demo.stderr)
    assert not (demo_out / "scenario").exists()  # refused before writing anything

    live.send_signal(signal.SIGTERM)
    assert live.wait(30) == 0
    demo_live.send_signal(signal.SIGTERM)
    assert demo_live.wait(30) == 0
    # only the live writer wrote: its final snapshot counts every record exactly once
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)


def test_the_lock_dies_with_its_process(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    stream = _log(log, 2)
    root = tmp_path / "snaps"
    live = _follow(log, root)
    wait_for(lambda: bool(_snaps(root)), what="a first snapshot")
    live.kill()  # SIGKILL: no cleanup runs, the kernel drops the lock
    live.wait(30)
    proc = _cli("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end",
                "--quiet")
    assert proc.returncode == 0, proc.stderr
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)


def test_replay_refuses_a_root_that_holds_another_graph(tmp_path: Path) -> None:
    first, second = tmp_path / "first.jsonl", tmp_path / "second.jsonl"
    _log(first, 3)
    other = _log(second, 4)
    root = tmp_path / "snaps"
    assert _cli("replay", str(first), "--out", str(root), "--quiet").returncode == 0
    before = _snaps(root)
    proc = _cli("replay", str(second), "--out", str(root), "--quiet")
    assert proc.returncode == 2
    line = _one_line(proc.stderr)
    assert str(root) in line and "--from" in line
    assert _snaps(root) == before  # nothing added

    empty = tmp_path / "empty"
    empty.mkdir()
    assert _cli("replay", str(second), "--out", str(empty), "--quiet").returncode == 0
    check_snapshot_against(other, newest_snapshot(empty))  # the default per-node contract

    # --from the root itself continues its own graph (the newest valid snapshot of it)
    more = tmp_path / "more.jsonl"
    more.write_bytes(first.read_bytes() + b'{"op": "insert", "src": "late", "dst": "v1"}\n')
    proc = _cli("replay", str(more), "--out", str(root), "--from", str(root), "--quiet")
    assert proc.returncode == 0, proc.stderr
    assert len(_snaps(root)) == len(before) + 1
    manifest = json.loads((newest_snapshot(root) / "manifest.json").read_text())
    assert manifest["sequence"] == len(before) + 1


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _scrape(port: int) -> dict[str, float]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            text = resp.read().decode()
    except OSError:
        return {}
    return {ln.split()[0]: float(ln.split()[1]) for ln in text.splitlines() if ln and ln[0] != "#"}


def test_metrics_tell_an_idle_healthy_service_from_a_stale_one(tmp_path: Path) -> None:
    """Records not yet in a snapshot, and the age of the newest snapshot (a restored one included)."""
    log = tmp_path / "events.jsonl"
    stream = _log(log, 5)
    root = tmp_path / "snaps"
    port = _free_port()
    # a long interval: everything read stays uncovered until the final snapshot
    proc = _follow(log, root, "--snapshot-interval", "3600", "--metrics", f"127.0.0.1:{port}")
    wait_for(lambda: _scrape(port).get("ranktide_events_applied_total", 0)
              + _scrape(port).get("ranktide_events_rejected_total", 0) == len(stream.records),
              what="every record applied")
    values = _scrape(port)
    assert values["ranktide_records_since_snapshot"] == len(stream.records)
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(30) == 0

    written = json.loads((newest_snapshot(root) / "manifest.json").read_text())["created_at"]
    restarted = _follow(log, root, "--snapshot-interval", "0.2", "--metrics", f"127.0.0.1:{port}")
    # the endpoint answers while the service restores: wait until the restored snapshot counts
    wait_for(lambda: math.isfinite(_scrape(port).get("ranktide_snapshot_age_seconds", math.nan)),
              what="the age of the restored snapshot")
    first = _scrape(port)
    # idle and healthy: nothing uncovered, and the age is that of the restored snapshot (not NaN)
    assert first["ranktide_records_since_snapshot"] == 0
    from datetime import datetime, timezone

    expected_age = (datetime.now(timezone.utc) - datetime.fromisoformat(written)).total_seconds()
    assert 0 <= first["ranktide_snapshot_age_seconds"] <= expected_age + 1
    assert first["ranktide_snapshot_timestamp_seconds"] == datetime.fromisoformat(written).timestamp()
    wait_for(lambda: _scrape(port)["ranktide_snapshot_age_seconds"] > 1.0, what="the idle age to grow")
    assert _scrape(port)["ranktide_records_since_snapshot"] == 0  # growing age alone is no alarm
    with open(log, "ab") as fh:
        fh.write(b'{"op": "insert", "src": "new", "dst": "v1"}\n')
    wait_for(lambda: _scrape(port)["ranktide_snapshot_timestamp_seconds"]
              > datetime.fromisoformat(written).timestamp(), what="a snapshot covering the new record")
    assert _scrape(port)["ranktide_records_since_snapshot"] == 0
    restarted.send_signal(signal.SIGTERM)
    assert restarted.wait(30) == 0


def test_recompute_into_a_root_another_writer_holds_exits_2(tmp_path: Path) -> None:
    """``ranktide recompute --out ROOT`` takes the root's writer lock like run and replay."""
    import subprocess
    import sys

    import pyarrow as pa
    import pyarrow.parquet as pq

    from ranktide.stream.rootlock import RootLock

    table = tmp_path / "edges.parquet"
    pq.write_table(pa.table({"src": ["a", "b"], "dst": ["b", "a"], "weight": [1.0, 2.0]}), table)
    lock = RootLock.acquire(tmp_path / "root", "a test holding the root")
    try:
        done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "recompute", str(table), "--out",
                               str(tmp_path / "root")], capture_output=True, text=True, timeout=300)
    finally:
        lock.release()
    assert done.returncode == 2, done.stderr
    assert str(os.getpid()) in done.stderr and len(done.stderr.strip().splitlines()) == 1
    done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "recompute", str(table), "--out",
                           str(tmp_path / "root"), "--quiet"], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
