"""Kafka ownership: the owner topic can be named; a run of another group is a second writer.

Runs the real command line against the real broker of the ``kafka_broker``
fixture; which topics exist is asked of the broker with confluent-kafka's
AdminClient. Scores are checked against NetworkX ``pagerank``.
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest
from confluent_kafka import Producer
from confluent_kafka.admin import AdminClient

from stream_helpers import Stream, check_snapshot_against, newest_snapshot, ranktide

pytestmark = pytest.mark.kafka


def _topics(bootstrap: str) -> set[str]:
    return set(AdminClient({"bootstrap.servers": bootstrap}).list_topics(timeout=30).topics)


@pytest.mark.parametrize("how", ["option", "environment", "config"])
def test_run_creates_and_holds_the_owner_topic_it_is_told(kafka_broker, tmp_path: Path, how: str) -> None:
    topic = f"edges-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(topic, partitions=2)
    stream = Stream()
    stream.extend(np.random.default_rng(9), 500, n_nodes=100)
    producer = Producer({"bootstrap.servers": kafka_broker.bootstrap})
    for key, value in stream.records:
        producer.produce(topic, key=key, value=value)
    assert producer.flush(60) == 0

    owner = f"ops.ranktide.{uuid.uuid4().hex[:6]}.owner"
    group = f"g-{topic}"
    root = tmp_path / "snaps"
    args = ["run", "--source", f"kafka://{kafka_broker.bootstrap}/{topic}", "--out", str(root),
            "--group", group, "--metrics", "", "--stop-at-end", "--quiet"]
    env = {}
    if how == "option":
        args += ["--owner-topic", owner]
    elif how == "environment":
        env["RANKTIDE_OWNER_TOPIC"] = owner
    else:
        config = tmp_path / "ranktide.toml"
        config.write_text(f'owner_topic = "{owner}"\n')
        args += ["--config", str(config)]
    proc = ranktide(*args, env=env)
    _, err = proc.communicate(timeout=180)
    assert proc.returncode == 0, err.decode()[-3000:]
    topics = _topics(kafka_broker.bootstrap)
    assert owner in topics and f"{group}.owner" not in topics
    manifest = check_snapshot_against(stream, newest_snapshot(root))  # the default per-node contract
    assert manifest["events_applied"] + manifest["events_rejected"] == len(stream.records)


def test_a_kafka_run_of_another_group_is_refused_on_a_live_root(kafka_broker, tmp_path: Path) -> None:
    """Same-group processes may wait as standbys beside the owner; another group is a second writer."""
    topic = f"edges-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(topic, partitions=1)
    producer = Producer({"bootstrap.servers": kafka_broker.bootstrap})
    producer.produce(topic, key=b"a", value=b'{"op": "insert", "src": "a", "dst": "b"}')
    assert producer.flush(60) == 0
    root = tmp_path / "snaps"
    base = ["run", "--source", f"kafka://{kafka_broker.bootstrap}/{topic}", "--out", str(root),
            "--metrics", "", "--snapshot-interval", "0.3"]
    owner = ranktide(*base, "--group", f"g1-{topic}")
    deadline = time.monotonic() + 120
    while not list(root.glob("snap-*")) and time.monotonic() < deadline:
        time.sleep(0.1)
    assert list(root.glob("snap-*")), "the owner wrote no snapshot"
    for extra in (["--group", f"g2-{topic}"], ["--source", f"file:{tmp_path / 'none.jsonl'}"]):
        proc = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", *base, "--group", f"g2-{topic}",
                               *extra, "--stop-at-end"], capture_output=True, text=True, timeout=120)
        assert proc.returncode == 2, proc.stderr
        assert f"pid {owner.pid}" in proc.stderr and "Traceback" not in proc.stderr
    owner.send_signal(signal.SIGTERM)
    assert owner.wait(60) == 0
