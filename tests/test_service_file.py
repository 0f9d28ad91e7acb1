"""The long-lived consumer on its file source: following, crash recovery, signals, bad folders.

Reference for the scores: NetworkX ``pagerank`` on the true final graph
(see :mod:`tests.stream_helpers`). Crashes are real ``kill -9`` of the child
process.
"""

from __future__ import annotations

import json
import signal
import time
from pathlib import Path

import numpy as np
import pytest

from stream_helpers import (Stream, check_snapshot_against, free_port, newest_snapshot, ranktide, sigterm_and_check,
                            wait_for, wait_until_counted)

TOLERANCE = 1e-6
SLOW = {"RANKTIDE_FILE_CHUNK_BYTES": "2048"}  # small polls, so a crash lands mid-stream


def _append(path: Path, records: list[tuple[bytes, bytes]]) -> None:
    with open(path, "ab") as fh:
        fh.write(b"".join(value + b"\n" for _, value in records))


def _logged_stream(folder: Path, rng: np.random.Generator, count: int, **kwargs) -> tuple[Stream, Path]:
    """``count`` records (with their truth) written to ``folder/events.jsonl``."""
    stream = Stream()
    stream.extend(rng, count, **kwargs)
    log = folder / "events.jsonl"
    _append(log, stream.records)
    return stream, log


def _has_snapshot(root: Path) -> bool:
    return root.is_dir() and any(p.name.startswith("snap-") for p in root.iterdir())


def _run_args(log: Path, root: Path, *extra: str) -> list[str]:
    return ["run", "--source", f"file:{log}", "--out", str(root), "--metrics", "",
            "--snapshot-interval", "0.2", "--tolerance", str(TOLERANCE), *extra]


def test_follows_a_growing_file_and_resumes_after_kill9(tmp_path: Path) -> None:
    rng = np.random.default_rng(11)
    stream, log = _logged_stream(tmp_path, rng, 6000)
    root = tmp_path / "snaps"
    first = ranktide(*_run_args(log, root), env=SLOW)
    wait_for(lambda: _has_snapshot(root), what="a first snapshot")
    # grow the file while the consumer runs, ending with half a line
    more = Stream(records=list(stream.records), edges=stream.edges, nodes=stream.nodes, malformed=stream.malformed)
    more.extend(rng, 6000)
    _append(log, more.records[len(stream.records):-1])
    last_value = more.records[-1][1]
    with open(log, "ab") as fh:
        fh.write(last_value[:7])
    time.sleep(0.1)
    first.kill()  # kill -9
    first.wait(10)
    before = json.loads((newest_snapshot(root) / "manifest.json").read_text())
    # the crash came mid-stream: the restart has records left to take
    assert before["events_applied"] + before["events_rejected"] < len(more.records)
    with open(log, "ab") as fh:
        fh.write(last_value[7:] + b"\n")
    second = ranktide(*_run_args(log, root, "--stop-at-end"), env=SLOW)
    out, err = second.communicate(timeout=120)
    assert second.returncode == 0, err.decode()
    manifest = check_snapshot_against(more, newest_snapshot(root), TOLERANCE)
    lines = log.read_bytes().count(b"\n")
    assert manifest["events_applied"] + manifest["events_rejected"] == lines
    assert manifest["events_rejected"] == more.malformed
    rejects = (root / "rejects.jsonl").read_text().splitlines()
    assert len(rejects) == more.malformed  # the sink holds each reject exactly once
    assert all({"file", "line", "offset", "reason"} <= set(json.loads(r)) for r in rejects)
    assert manifest["positions"]["files"][str(log.resolve())]["offset"] == log.stat().st_size


def test_sigterm_finishes_with_a_final_snapshot(tmp_path: Path) -> None:
    stream, log = _logged_stream(tmp_path, np.random.default_rng(5), 3000)
    root = tmp_path / "snaps"
    port = free_port()
    proc = ranktide(*_run_args(log, root, "--snapshot-interval", "3600", "--metrics", f"127.0.0.1:{port}"))
    wait_until_counted(proc, port, len(stream.records))  # however loaded the machine
    sigterm_and_check(proc, stream, root, TOLERANCE)


def test_a_corrupted_newest_snapshot_is_skipped(tmp_path: Path) -> None:
    rng = np.random.default_rng(8)
    stream, log = _logged_stream(tmp_path, rng, 2000)
    root = tmp_path / "snaps"
    assert ranktide(*_run_args(log, root, "--stop-at-end")).wait(60) == 0
    stream.extend(rng, 2000)
    _append(log, stream.records[2000:])
    assert ranktide(*_run_args(log, root, "--stop-at-end")).wait(60) == 0
    newest = newest_snapshot(root)
    scores = newest / "scores.parquet"
    data = bytearray(scores.read_bytes())
    data[len(data) // 2] ^= 0xFF
    scores.write_bytes(bytes(data))
    proc = ranktide(*_run_args(log, root, "--stop-at-end"))
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err.decode()
    assert "skipping snapshot" in err.decode() and "sha256" in err.decode()
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)


def test_an_unwritable_snapshot_root_is_a_clear_error(tmp_path: Path) -> None:
    _, log = _logged_stream(tmp_path, np.random.default_rng(2), 200)
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the snapshot root should be")
    proc = ranktide(*_run_args(log, blocker / "snaps", "--stop-at-end"))
    _, err = proc.communicate(timeout=60)
    assert proc.returncode != 0
    assert "not-a-folder" in err.decode()
    assert blocker.read_text().startswith("a file")


def test_a_missing_log_is_a_clear_error(tmp_path: Path) -> None:
    proc = ranktide(*_run_args(tmp_path / "nope.jsonl", tmp_path / "snaps", "--stop-at-end"))
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 2
    assert "nope.jsonl" in err.decode() and "no such" in err.decode()


@pytest.mark.parametrize("as_env", [False, True])
def test_configuration_file_environment_and_secrets(tmp_path: Path, as_env: bool) -> None:
    from ranktide.stream.config import load_config

    cfg_file = tmp_path / "ranktide.toml"
    cfg_file.write_text(
        'source = "kafka://127.0.0.1:1/edges"\ntolerance = 1e-5\n[kafka]\n"sasl.password" = "hunter2"\n'
    )
    env = {"RANKTIDE_TOLERANCE": "1e-7", "RANKTIDE_KAFKA_SSL_KEY_PASSWORD": "s3cret"} if as_env else {}
    cfg = load_config(cfg_file, env=env, overrides={"snapshot_interval": 5})
    assert cfg.tolerance == (1e-7 if as_env else 1e-5)
    assert cfg.snapshot_interval == 5
    assert cfg.kafka["sasl.password"] == "hunter2"
    shown = json.dumps(cfg.redacted())
    assert "hunter2" not in shown and "s3cret" not in shown
    if as_env:
        assert cfg.kafka["ssl.key.password"] == "s3cret"


def test_metrics_endpoint_and_json_logs(tmp_path: Path) -> None:
    """Prometheus text format (exposition format 0.0.4) on 127.0.0.1, structured logs on request."""
    import urllib.request

    stream, log = _logged_stream(tmp_path, np.random.default_rng(6), 3000)
    root = tmp_path / "snaps"
    port = free_port()
    args = [a for a in _run_args(log, root) if a not in ("--metrics", "")]
    proc = ranktide(*args, "--metrics", f"127.0.0.1:{port}", "--log-json")
    wait_for(lambda: _has_snapshot(root), what="a first snapshot")
    def scrape() -> tuple[str, dict[str, float]]:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as resp:
            assert resp.headers["Content-Type"].startswith("text/plain")
            text = resp.read().decode()
        return text, {ln.split()[0]: float(ln.split()[1]) for ln in text.splitlines() if ln and ln[0] != "#"}

    def counted(values: dict[str, float]) -> float:
        return values.get("ranktide_events_applied_total", 0) + values.get("ranktide_events_rejected_total", 0)

    body, metrics = scrape()
    deadline = time.monotonic() + 30
    # the gauges of a snapshot are set just after its folder appears: wait for the counter that follows them
    while (counted(metrics) < len(stream.records) or metrics.get("ranktide_snapshots_total", 0) < 1) \
            and time.monotonic() < deadline:
        time.sleep(0.1)
        body, metrics = scrape()
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=30)
    assert counted(metrics) == len(stream.records)
    assert metrics['ranktide_certified_bound{profile="global"}'] <= TOLERANCE
    assert metrics['ranktide_rtol_reached{profile="global"}'] <= 1e-3
    assert metrics["ranktide_snapshots_total"] >= 1
    assert "# TYPE ranktide_consumer_lag gauge" in body
    entries = [json.loads(line) for line in err.decode().splitlines() if line.startswith("{")]
    assert entries and all({"time", "level", "logger", "message"} <= set(e) for e in entries)
    assert any("snapshot" in e["message"] for e in entries)


def test_a_full_disk_is_a_clear_error_and_leaves_no_half_snapshot(tiny_disk: Path, tmp_path: Path) -> None:
    import subprocess

    rng = np.random.default_rng(12)
    stream, log = _logged_stream(tmp_path, rng, 300, n_nodes=100)
    root = tiny_disk / "snaps"
    assert ranktide(*_run_args(log, root, "--stop-at-end")).wait(60) == 0  # a small first snapshot fits
    stream.extend(rng, 60_000, n_nodes=60_000)  # the next one does not
    _append(log, stream.records[300:])
    proc = ranktide(*_run_args(log, root, "--stop-at-end"))
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 3
    assert "No space left on device" in err.decode() and "cannot write snapshot" in err.decode()
    from ranktide.stream.snapshots import read_manifest, verify

    left = sorted(root.iterdir())
    assert not [p for p in left if p.name.endswith(".partial")]  # the failed one was cleaned up
    for snap in (p for p in left if p.name.startswith("snap-")):  # every snapshot a restart may load is whole
        verify(snap, read_manifest(snap))
    # with room again, a restart resumes from the good snapshot and counts every record once
    subprocess.run(["mount", "-o", "remount,size=256m", str(tiny_disk)], check=True)
    assert ranktide(*_run_args(log, root, "--stop-at-end")).wait(120) == 0
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)
