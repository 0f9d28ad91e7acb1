"""``ranktide record``: copy a topic, every partition, into a Parquet event log.

The recording keeps each message as it was (its value bytes and content
type) with its topic, partition, offset and timestamp. A replay of the
recording therefore decides every record exactly as the live service did,
malformed messages included, and can skip what a snapshot already covers
by comparing partition offsets. Rows are written in row groups of
``rows_per_group`` messages, so memory stays flat whatever the topic's size.

Columns: ``topic`` (string), ``partition`` (int32), ``offset`` (int64),
``timestamp`` (int64, ms; -1 when the broker gave none), ``content_type``
(string, null for JSON), ``value`` (binary).
"""

from __future__ import annotations

import logging
import os
import signal
import sys
import time
import uuid
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from ranktide.stream.events import ARROW_CONTENT_TYPE, is_arrow_message
from ranktide.stream.sources import kafka_config, parse_kafka_url, wait_for_brokers

log = logging.getLogger("ranktide.record")

RECORDED_SCHEMA = pa.schema([
    ("topic", pa.string()),
    ("partition", pa.int32()),
    ("offset", pa.int64()),
    ("timestamp", pa.int64()),
    ("content_type", pa.string()),
    ("value", pa.binary()),
])


def _assign_all(consumer, topics: list[str], timeout: float) -> dict[tuple[str, int], int]:
    """Assign every partition from its start; return the end offsets seen now."""
    from confluent_kafka import OFFSET_BEGINNING, TopicPartition

    meta = consumer.list_topics(timeout=timeout)
    parts, ends = [], {}
    for topic in topics:
        if topic not in meta.topics or meta.topics[topic].error is not None:
            raise RuntimeError(f"topic {topic!r} does not exist on the cluster")
        for p in meta.topics[topic].partitions:
            parts.append(TopicPartition(topic, p, OFFSET_BEGINNING))
            low, high = consumer.get_watermark_offsets(TopicPartition(topic, p), timeout=timeout)
            ends[(topic, p)] = high
    consumer.assign(parts)
    return ends


def record_topic(url: str, out: Path, until_end: bool, properties: dict[str, str] | None = None,
                 rows_per_group: int = 100_000, progress: bool = False, connect_timeout: float = 30.0) -> int:
    """Copy the topics of ``url`` into ``out``; return how many messages were written.

    Raises
    ------
    SourceError
        When the brokers do not answer within ``connect_timeout`` seconds.
    OutputError
        When ``out`` cannot be written.
    """
    from confluent_kafka import Consumer, KafkaError

    from ranktide.stream.snapshots import check_writable

    bootstrap, topics = parse_kafka_url(url)
    check_writable(Path(out).parent, "recording", out)
    wait_for_brokers(bootstrap, properties or {}, connect_timeout)
    consumer = Consumer(kafka_config(bootstrap, properties or {}, **{
        "group.id": f"ranktide-record-{uuid.uuid4().hex[:8]}",
        "enable.auto.commit": False, "enable.partition.eof": True,
    }))
    stop = {"now": False}
    signal.signal(signal.SIGINT, lambda *_: stop.update(now=True))
    signal.signal(signal.SIGTERM, lambda *_: stop.update(now=True))
    ends = _assign_all(consumer, topics, timeout=30)
    remaining = {k for k, high in ends.items() if high > 0}
    total = sum(ends.values())
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    partial = out.with_name(out.name + ".partial")
    written = 0
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=total if until_end else None, unit="msg", desc="record", file=sys.stderr)
    rows: dict[str, list] = {name: [] for name in RECORDED_SCHEMA.names}
    with pq.ParquetWriter(partial, RECORDED_SCHEMA, compression="zstd") as writer:
        while not stop["now"] and not (until_end and not remaining):
            for msg in consumer.consume(num_messages=10_000, timeout=0.5):
                err = msg.error()
                if err is not None:
                    if err.code() != KafkaError._PARTITION_EOF:
                        log.warning("Kafka: %s", err.str())
                    continue
                key = (msg.topic(), msg.partition())
                if until_end and (key not in remaining or msg.offset() >= ends[key]):
                    continue
                _append(rows, msg)
                written += 1
                if until_end and msg.offset() + 1 >= ends[key]:
                    remaining.discard(key)
            if len(rows["value"]) >= rows_per_group:
                writer.write_table(pa.table(rows, schema=RECORDED_SCHEMA))
                rows = {name: [] for name in RECORDED_SCHEMA.names}
            if bar is not None:
                bar.update(written - bar.n)
        if rows["value"]:
            writer.write_table(pa.table(rows, schema=RECORDED_SCHEMA))
    consumer.close()
    if bar is not None:
        bar.close()
    os.replace(partial, out)
    return written


def _append(rows: dict[str, list], msg) -> None:
    kind, stamp = msg.timestamp()
    rows["topic"].append(msg.topic())
    rows["partition"].append(msg.partition())
    rows["offset"].append(msg.offset())
    rows["timestamp"].append(stamp if kind != 0 else -1)
    rows["content_type"].append(ARROW_CONTENT_TYPE if is_arrow_message(msg) else None)
    rows["value"].append(msg.value() if msg.value() is not None else b"")


def run_record(args) -> int:
    """The ``ranktide record`` command."""
    from ranktide.stream.snapshots import OutputError

    started = time.perf_counter()
    timeout = args.connect_timeout or float(os.environ.get("RANKTIDE_CONNECT_TIMEOUT", "30"))
    try:
        count = record_topic(args.source, args.out, args.until_end, progress=sys.stderr.isatty(),
                             connect_timeout=timeout)
    except (OutputError, OSError) as exc:
        print(f"ranktide record: error: {exc}", file=sys.stderr)
        return 3
    except (RuntimeError, ValueError) as exc:
        print(f"ranktide record: error: {exc}", file=sys.stderr)
        return 2
    print(f"recorded {count:,} messages into {args.out} in {time.perf_counter() - started:.1f} s")
    return 0
