"""The long-lived consumer against a real Apache Kafka broker (KRaft, single node, loopback).

The broker is started by the ``kafka_broker`` fixture of ``conftest.py``.
Reference for the scores: NetworkX ``pagerank`` on the true final graph.
"""

from __future__ import annotations

import json
import signal
import time
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from confluent_kafka import Consumer, Producer

from ranktide.stream.events import ARROW_CONTENT_TYPE
from stream_helpers import (Stream, check_snapshot_against, free_port, newest_snapshot, ranktide, sigterm_and_check,
                            wait_until_counted)

pytestmark = pytest.mark.kafka
TOLERANCE = 1e-6


def _produce(bootstrap: str, topic: str, records: list[tuple[bytes, bytes]], headers=None) -> None:
    producer = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20, "enable.idempotence": True})
    for key, value in records:
        producer.produce(topic, key=key, value=value, headers=headers)
        producer.poll(0)
    assert producer.flush(60) == 0


def _topic(broker, partitions: int = 3) -> str:
    name = f"edges-{uuid.uuid4().hex[:8]}"
    broker.create_topic(name, partitions=partitions)
    return name


def _args(broker, topic: str, root: Path, *extra: str) -> list[str]:
    return ["run", "--source", f"kafka://{broker.bootstrap}/{topic}", "--out", str(root),
            "--group", f"g-{topic}", "--metrics", "", "--snapshot-interval", "0.3",
            "--tolerance", str(TOLERANCE), *extra]


def _wait_snapshot_count(root: Path, count: int, timeout: float = 60) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if root.is_dir() and sum(p.name.startswith("snap-") for p in root.iterdir()) >= count:
            return
        time.sleep(0.05)
    raise AssertionError(f"fewer than {count} snapshots under {root}")


def _wait_for_records(root: Path, count: int, timeout: float = 120) -> None:
    """Until the newest snapshot under ``root`` covers ``count`` records."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            m = json.loads((newest_snapshot(root) / "manifest.json").read_text())
        except (AssertionError, OSError, ValueError):
            m = {"events_applied": 0, "events_rejected": 0}
        if m["events_applied"] + m["events_rejected"] >= count:
            return
        time.sleep(0.2)
    raise AssertionError(f"no snapshot under {root} covers {count} records")


def _wait_owner_group_members(broker, group: str, count: int, timeout: float = 120) -> None:
    """Until the broker reports ``count`` members in ``group`` (the owner lock's group)."""
    from confluent_kafka.admin import AdminClient

    admin = AdminClient({"bootstrap.servers": broker.bootstrap})
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            described = admin.describe_consumer_groups([group])[group].result(timeout=10)
            if len(described.members) >= count:
                return
        except Exception:  # noqa: BLE001 - the group may not exist yet
            pass
        time.sleep(0.2)
    raise AssertionError(f"group {group} did not reach {count} members within {timeout} s")


def test_two_kill9_and_a_broker_restart_count_every_message_once(kafka_broker, tmp_path: Path) -> None:
    rng = np.random.default_rng(21)
    topic = _topic(kafka_broker)
    root = tmp_path / "snaps"
    stream = Stream()
    slow = {"RANKTIDE_POLL_RECORDS": "300"}  # small polls: the kills land mid-stream
    stream.extend(rng, 12_000)
    _produce(kafka_broker.bootstrap, topic, stream.records)
    first = ranktide(*_args(kafka_broker, topic, root), env=slow)
    _wait_snapshot_count(root, 1)
    time.sleep(float(rng.uniform(0.2, 0.8)))
    first.kill()
    first.wait(10)
    stream.extend(rng, 12_000)
    _produce(kafka_broker.bootstrap, topic, stream.records[12_000:])
    second = ranktide(*_args(kafka_broker, topic, root), env=slow)
    time.sleep(float(rng.uniform(1.0, 2.0)))
    kafka_broker.stop(keep_data=True)   # the broker goes away ...
    time.sleep(2.0)
    kafka_broker.start()                # ... and comes back
    time.sleep(float(rng.uniform(0.5, 1.5)))
    second.kill()
    second.wait(10)
    stream.extend(rng, 6_000)
    _produce(kafka_broker.bootstrap, topic, stream.records[24_000:])
    last = ranktide(*_args(kafka_broker, topic, root, "--stop-at-end"))
    _, err = last.communicate(timeout=300)
    assert last.returncode == 0, err.decode()[-3000:]
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)
    assert manifest["events_rejected"] == stream.malformed
    assert sum(manifest["positions"]["kafka"][topic].values()) == len(stream.records)


def test_sigterm_exits_zero_with_a_final_snapshot_and_commits(kafka_broker, tmp_path: Path) -> None:
    topic = _topic(kafka_broker)
    root = tmp_path / "snaps"
    stream = Stream()
    stream.extend(np.random.default_rng(4), 5_000)
    _produce(kafka_broker.bootstrap, topic, stream.records)
    port = free_port()
    proc = ranktide(*_args(kafka_broker, topic, root, "--snapshot-interval", "3600",
                           "--metrics", f"127.0.0.1:{port}"))
    # it takes every record (seen on its metrics, however loaded the machine); no snapshot is due before the signal
    wait_until_counted(proc, port, len(stream.records))
    sigterm_and_check(proc, stream, root, TOLERANCE)
    from confluent_kafka import TopicPartition

    consumer = Consumer({"bootstrap.servers": kafka_broker.bootstrap, "group.id": f"g-{topic}"})
    committed = consumer.committed([TopicPartition(topic, p) for p in range(3)], timeout=10)
    consumer.close()
    # offsets were committed after the final snapshot, and only then
    assert sum(max(tp.offset, 0) for tp in committed) == len(stream.records)


def test_arrow_batches_and_a_rejects_topic(kafka_broker, tmp_path: Path) -> None:
    topic = _topic(kafka_broker, partitions=1)
    rejects_topic = _topic(kafka_broker, partitions=1)
    root = tmp_path / "snaps"
    table = pa.table({
        "op": ["insert", "insert", "insert", "delete", "insert"],
        "src": ["a", "b", "c", "a", "d"],
        "dst": ["b", "c", "a", "b", "d"],
        "weight": [1.0, 2.0, 1.0, None, -3.0],
        "ts": pa.array([1, 2, 3, 4, 5], pa.int64()),
    })
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    _produce(kafka_broker.bootstrap, topic, [(b"k", sink.getvalue().to_pybytes())],
             headers=[("content-type", ARROW_CONTENT_TYPE.encode())])
    _produce(kafka_broker.bootstrap, topic, [(b"k", b"{broken")])
    proc = ranktide(*_args(kafka_broker, topic, root, "--stop-at-end", "--rejects-topic", rejects_topic))
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err.decode()[-3000:]
    stream = Stream(edges={("b", "c"): 2.0, ("c", "a"): 1.0}, nodes={"a", "b", "c"})
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert (manifest["events_applied"], manifest["events_rejected"]) == (4, 2)
    consumer = Consumer({"bootstrap.servers": kafka_broker.bootstrap, "group.id": "check",
                         "auto.offset.reset": "earliest"})
    consumer.subscribe([rejects_topic])
    got = []
    deadline = time.monotonic() + 30
    while len(got) < 2 and time.monotonic() < deadline:
        msg = consumer.poll(0.5)
        if msg is not None and msg.error() is None:
            got.append(json.loads(msg.value()))
    consumer.close()
    reasons = sorted(r["reason"] for r in got)
    assert len(got) == 2 and all(r["topic"] == topic and r["partition"] == 0 for r in got)
    assert reasons[0].startswith("not JSON") and "weight must be a finite number > 0" in reasons[1]


def test_score_feed_carries_the_latest_score_of_every_changed_node(kafka_broker, tmp_path: Path) -> None:
    topic = _topic(kafka_broker)
    feed = _topic(kafka_broker, partitions=1)
    root = tmp_path / "snaps"
    stream = Stream()
    rng = np.random.default_rng(9)
    stream.extend(rng, 4_000, n_nodes=300)
    _produce(kafka_broker.bootstrap, topic, stream.records)
    proc = ranktide(*_args(kafka_broker, topic, root, "--stop-at-end", "--score-topic", feed),
                    env={"RANKTIDE_SCORE_INTERVAL": "0.2", "RANKTIDE_POLL_RECORDS": "500"})
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err.decode()[-3000:]
    latest: dict[str, dict] = {}
    consumer = Consumer({"bootstrap.servers": kafka_broker.bootstrap, "group.id": "feed-check",
                         "auto.offset.reset": "earliest", "enable.partition.eof": True})
    consumer.subscribe([feed])
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        msg = consumer.poll(0.5)
        if msg is None:
            continue
        if msg.error() is not None:
            break  # end of the partition
        latest[msg.key().decode()] = json.loads(msg.value())
    consumer.close()
    snap = newest_snapshot(root)
    import pyarrow.parquet as pq

    final = {r["node"]: r["score"] for r in pq.read_table(snap / "scores.parquet").to_pylist()
             if r["profile"] == "global"}
    assert set(final) == {key.split("/", 1)[1] for key in latest if key.startswith("global/")}
    for node, score in final.items():
        sent = latest[f"global/{node}"]
        assert sent["node"] == node and sent["profile"] == "global"
        assert abs(sent["score"] - score) <= 0.01 * score + 1e-15
        assert sent["certified_bound"] <= TOLERANCE
        # the per-node bound travels with each score: within rtol of it
        assert 0 < sent["error_bound"] <= 1e-3 * sent["score"]


def test_record_then_replay_reproduces_the_service_snapshot(kafka_broker, tmp_path: Path) -> None:
    from ranktide.replay.record import record_topic
    from ranktide.replay.replay import ReplayOptions, replay_log

    topic = _topic(kafka_broker)
    stream = Stream()
    stream.extend(np.random.default_rng(13), 6_000)
    _produce(kafka_broker.bootstrap, topic, stream.records)
    proc = ranktide(*_args(kafka_broker, topic, tmp_path / "live", "--stop-at-end"))
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err.decode()[-3000:]
    recording = tmp_path / "topic.parquet"
    assert record_topic(f"kafka://{kafka_broker.bootstrap}/{topic}", recording, until_end=True) == len(stream.records)
    replayed = replay_log(recording, tmp_path / "replayed", ReplayOptions(tolerance=TOLERANCE))
    live = newest_snapshot(tmp_path / "live")
    live_manifest = json.loads((live / "manifest.json").read_text())
    for key in ("events_applied", "events_noop", "events_rejected"):
        assert getattr(replayed.counters, key) == live_manifest[key]
    assert (replayed.snapshot / "edges.parquet").read_bytes() == (live / "edges.parquet").read_bytes()
    check_snapshot_against(stream, replayed.snapshot, TOLERANCE)
    # a replay of the recording from the live snapshot has nothing left to add
    again = replay_log(recording, tmp_path / "live", ReplayOptions(from_snapshot=live))
    assert again.counters.events_applied == live_manifest["events_applied"]


def test_a_standby_in_the_same_group_takes_over_without_loss(kafka_broker, tmp_path: Path) -> None:
    """Two processes, one group, one snapshot root: the owner hands over at a durable snapshot.

    Events keep arriving while the owner is stopped, so the handover lands mid-stream.
    """
    import threading

    rng = np.random.default_rng(27)
    topic = _topic(kafka_broker)
    root = tmp_path / "snaps"
    stream = Stream()
    stream.extend(rng, 20_000)
    pieces = [stream.records[i:i + 1_000] for i in range(0, len(stream.records), 1_000)]

    def produce_slowly() -> None:
        for piece in pieces:
            _produce(kafka_broker.bootstrap, topic, piece)
            time.sleep(0.25)

    producer = threading.Thread(target=produce_slowly)
    producer.start()
    owner = ranktide(*_args(kafka_broker, topic, root))
    _wait_snapshot_count(root, 1)
    standby = ranktide(*_args(kafka_broker, topic, root))
    _wait_owner_group_members(kafka_broker, f"g-{topic}.owner", 2)  # the standby has joined and waits
    owner.send_signal(signal.SIGTERM)
    _, owner_err = owner.communicate(timeout=60)
    assert owner.returncode == 0, owner_err.decode()[-2000:]
    handed = json.loads((newest_snapshot(root) / "manifest.json").read_text())
    assert handed["events_applied"] + handed["events_rejected"] < len(stream.records)  # mid-stream
    producer.join()
    _wait_for_records(root, len(stream.records))
    standby.send_signal(signal.SIGTERM)
    _, err = standby.communicate(timeout=60)
    assert standby.returncode == 0, err.decode()[-3000:]
    text = err.decode()
    assert "now owns the graph" in text and f"resumed from snap-{handed['sequence']:08d}" in text
    manifest = check_snapshot_against(stream, newest_snapshot(root), TOLERANCE)
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)


def test_prefetched_batches_move_no_position_until_taken(kafka_broker) -> None:
    """The fetch thread reads ahead; positions move only with the batches the service takes.

    After a seek (as on a take-over) what was read ahead is dropped and read again.
    """
    from ranktide.stream.events import Limits
    from ranktide.stream.sources import KafkaSource

    topic = _topic(kafka_broker, partitions=1)
    records = [(None, json.dumps({"op": "insert", "src": f"a{i}", "dst": "b"}).encode()) for i in range(50)]
    _produce(kafka_broker.bootstrap, topic, records)
    source = KafkaSource(f"kafka://{kafka_broker.bootstrap}/{topic}", f"g-{topic}", {}, Limits(), batch_records=10)
    try:
        source.seek({})
        deadline = time.monotonic() + 60
        while not source._prefetch._queue.full() and time.monotonic() < deadline:
            time.sleep(0.05)  # the thread reads ahead until its queue is full
        assert source._prefetch._queue.full()
        assert source.positions() == {"kafka": {topic: {"0": 0}}}
        first = None
        while first is None:
            first = source.poll(5.0)
        assert len(first.parsed.batch) == 10
        assert source.positions() == {"kafka": {topic: {"0": 10}}}
        source.seek({"kafka": {topic: {"0": 5}}})
        again = None
        while again is None:
            again = source.poll(5.0)
        assert again.parsed.batch.src[0].as_py() == "a5"  # read again from the seek, not from the read-ahead
        taken = 5 + len(again.parsed.batch)
        while not source.at_end():
            chunk = source.poll(1.0)
            taken += len(chunk.parsed.batch) if chunk is not None else 0
        assert taken == 50
        assert source.positions() == {"kafka": {topic: {"0": 50}}}
        deadline = time.monotonic() + 10
        while not source.lag() and time.monotonic() < deadline:
            time.sleep(0.1)  # the thread notes the cached high watermark after its next fetch
        assert source.lag() == {f"{topic}/0": 0}
    finally:
        source.close()
