"""Round trip through a real local Kafka broker, across a restart."""

from __future__ import annotations

import uuid
from collections.abc import Iterator

import pytest
from confluent_kafka import Consumer, KafkaException, Producer

from ranktide.stream.broker import LocalKafka

pytestmark = pytest.mark.kafka

COUNT = 100


@pytest.fixture
def broker() -> Iterator[LocalKafka]:
    """A broker of this test's own, since the test stops and restarts it."""
    kafka = LocalKafka()
    kafka.start()
    try:
        yield kafka
    finally:
        kafka.stop()


def _produce(bootstrap: str, topic: str, values: list[str]) -> None:
    """Write ``values`` to ``topic`` and wait until all are acknowledged."""
    failures: list[str] = []

    def report(err: object, msg: object) -> None:
        if err is not None:
            failures.append(str(err))

    producer = Producer({"bootstrap.servers": bootstrap, "acks": "all"})
    for i, value in enumerate(values):
        producer.produce(topic, key=str(i).encode(), value=value.encode(), on_delivery=report)
    assert producer.flush(30) == 0, "messages still queued after 30 s"
    assert not failures, failures


def _consume(bootstrap: str, topic: str, expected: int, timeout: float = 60.0) -> list[str]:
    """Read ``topic`` from the start with a new group until ``expected`` values came."""
    consumer = Consumer({
        "bootstrap.servers": bootstrap,
        "group.id": f"test-{uuid.uuid4().hex}",
        "auto.offset.reset": "earliest",
        "enable.auto.commit": False,
    })
    values: list[str] = []
    try:
        consumer.subscribe([topic])
        for _ in range(int(timeout)):
            for msg in consumer.consume(num_messages=COUNT, timeout=1.0):
                if msg.error():
                    raise KafkaException(msg.error())
                values.append(msg.value().decode())
            if len(values) >= expected:
                break
    finally:
        consumer.close()
    return values


def test_round_trip_survives_restart(broker: LocalKafka) -> None:
    topic = "broker-check"
    broker.create_topic(topic, partitions=3)
    sent = [f"value-{i}" for i in range(COUNT)]
    _produce(broker.bootstrap, topic, sent)
    assert sorted(_consume(broker.bootstrap, topic, COUNT)) == sorted(sent)

    bootstrap = broker.bootstrap
    broker.stop(keep_data=True)
    assert not broker.is_running()
    broker.start()
    assert broker.bootstrap == bootstrap, "a restarted broker must keep its address"
    assert sorted(_consume(broker.bootstrap, topic, COUNT)) == sorted(sent)


def test_shared_fixture_answers(kafka_broker: LocalKafka) -> None:
    kafka_broker.create_topic("fixture-check", partitions=1, exist_ok=True)
    kafka_broker.create_topic("fixture-check", partitions=1, exist_ok=True)
    assert kafka_broker.is_running()
    assert kafka_broker.bootstrap.startswith("127.0.0.1:")
