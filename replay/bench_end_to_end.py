"""End-to-end measurements of ``ranktide bench``: log replay and the service on a local broker.

The replay floor sets reading and parsing a log alone against replaying it
into snapshots; the end-to-end run times ``ranktide run`` consuming JSON and
Arrow IPC messages from a local Kafka broker, with start-up and the final
snapshot shown apart.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import numpy as np

from ranktide.replay.graphs import PowerLawSampler
from ranktide.replay.bench_common import ARROW_ROWS, _say, _timed
from ranktide.replay.bench_workloads import Batch, EdgeSet, mixed_batch


# ====================================================================== replay floor


def insert_lines(src: np.ndarray, dst: np.ndarray) -> list[str]:
    """JSON lines of insert events (built with Arrow's string kernels, no per-edge formatting)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    s = pc.cast(pa.array(src), pa.string())
    d = pc.cast(pa.array(dst), pa.string())
    lines = pc.binary_join_element_wise('{"op":"insert","src":"', s, '","dst":"', d, '"}', "")
    return lines.to_pylist()


def write_logs(src: np.ndarray, dst: np.ndarray, folder: Path) -> tuple[Path, Path]:
    """The edges as insert events: a JSON Lines log and a Parquet log."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    jsonl = folder / "edges.jsonl"
    with open(jsonl, "w", encoding="utf-8") as fh:
        fh.write("\n".join(insert_lines(src, dst)))
        fh.write("\n")
    parquet = folder / "edges.parquet"
    table = pa.table({
        "op": pa.array(["insert"] * src.size, pa.string()),
        "src": pa.array(src).cast(pa.string()), "dst": pa.array(dst).cast(pa.string()),
        "weight": pa.array(np.ones(src.size)), "ts": pa.array(np.full(src.size, -1, np.int64)).cast(pa.int64()),
    })
    pq.write_table(table, parquet, compression="zstd")
    return jsonl, parquet


def read_only(path: Path) -> int:
    """Read and parse a log, discarding the events; return how many were valid."""
    from ranktide.stream.logs import read_log

    return sum(len(chunk.parsed.batch) for chunk in read_log(path))


def measure_replay(src: np.ndarray, dst: np.ndarray, folder: Path) -> dict:
    """Replay floor: reading + parsing alone against ``replay_log`` for JSONL and Parquet."""
    from ranktide.replay.replay import ReplayOptions, replay_log

    jsonl, parquet = write_logs(src, dst, folder)
    out: dict = {"events": int(src.size)}
    for fmt, path, target in (("jsonl", jsonl, 3.0), ("parquet", parquet, 1.5)):
        _say(f"replay floor: {fmt} ({src.size:,} events)")
        count, read_s = _timed(lambda: read_only(path))
        summary, replay_s = _timed(lambda: replay_log(path, folder / f"replay-{fmt}", ReplayOptions()))
        out[fmt] = {
            "file_bytes": path.stat().st_size, "read_parse_seconds": read_s, "replay_seconds": replay_s,
            "ratio": replay_s / read_s, "target_ratio": target, "meets_target": replay_s / read_s <= target,
            "valid_events": int(count), "events_applied": summary.counters.events_applied,
            "certified_bound": summary.bounds.get("global"),
        }
    return out


# ====================================================================== end to end


def e2e_events(edges: EdgeSet, sampler: PowerLawSampler, count: int, rng: np.random.Generator) -> Batch:
    """``count`` mixed events against the snapshot's edge set (a copy; the set is not changed)."""
    copy = edges.copy()
    return mixed_batch(count, copy, sampler, rng)


def event_table(b: Batch):
    """The wire columns op, src, dst, weight, ts of a batch."""
    import pyarrow as pa

    names = np.array(["insert", "delete", "seed"], dtype=object)[b.op]
    ts = 1_733_050_000_000 + np.arange(len(b), dtype=np.int64)
    return pa.table({"op": pa.array(names, pa.string()), "src": pa.array(b.src).cast(pa.string()),
                     "dst": pa.array(b.dst).cast(pa.string()), "weight": pa.array(b.weight), "ts": pa.array(ts)})


def json_messages(b: Batch) -> list[bytes]:
    """One JSON event per message (built with Arrow's string kernels)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    t = event_table(b)
    w = pc.if_else(pc.equal(t["op"], "insert"),
                   pc.binary_join_element_wise(',"weight":', pc.cast(t["weight"], pa.string()), ""), "")
    parts = ['{"op":"', t["op"], '","src":"', t["src"], '","dst":"', t["dst"], '"', w,
             ',"ts":', pc.cast(t["ts"], pa.string()), "}"]
    return [s.encode() for s in pc.binary_join_element_wise(*parts, "").to_pylist()]


def arrow_messages(b: Batch, rows: int = ARROW_ROWS) -> list[bytes]:
    """Arrow IPC streams of ``rows`` events each."""
    import pyarrow as pa

    table = event_table(b)
    out = []
    for start in range(0, table.num_rows, rows):
        sink = pa.BufferOutputStream()
        part = table.slice(start, rows)
        with pa.ipc.new_stream(sink, part.schema) as writer:
            writer.write_table(part)
        out.append(sink.getvalue().to_pybytes())
    return out


def produce(bootstrap: str, topic: str, values: list[bytes], headers: list | None) -> None:
    """Send every value to ``topic`` and wait until the broker has them (not timed)."""
    from confluent_kafka import Producer

    producer = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20, "batch.num.messages": 10_000,
                         "queue.buffering.max.messages": 2_000_000, "message.max.bytes": 8 << 20})
    for i, value in enumerate(values):
        while True:
            try:
                producer.produce(topic, value=value, headers=headers)
                break
            except BufferError:
                producer.poll(0.05)
        if i % 10_000 == 0:
            producer.poll(0)
    if producer.flush(120) != 0:
        raise RuntimeError(f"could not deliver every message to {topic}")


def timed_service(source: str, out: Path) -> dict:
    """Run the service to the end of its source and time it, with restore and snapshots apart."""
    from ranktide.stream.config import ServiceConfig
    from ranktide.stream.service import Service
    from ranktide.stream.snapshots import load_latest

    spent = {"restore": 0.0, "snapshot": 0.0, "owner_wait": 0.0}

    class TimedService(Service):
        def _take_over(self, rejects):  # noqa: D401 - same contract as Service._take_over
            spent["owner_wait"] = time.perf_counter() - began  # joining the owner group
            return super()._take_over(rejects)

        def _restore(self, rejects):  # noqa: D401 - same contract as Service._restore
            started = time.perf_counter()
            try:
                return super()._restore(rejects)
            finally:
                spent["restore"] += time.perf_counter() - started

        def _snapshot(self, rejects, reason="interval"):
            started = time.perf_counter()
            try:
                return super()._snapshot(rejects, reason)
            finally:
                spent["snapshot"] += time.perf_counter() - started

    cfg = ServiceConfig(source=source, out=str(out), stop_at_end=True, snapshot_interval=60, metrics="")
    began = time.perf_counter()
    code, total = _timed(lambda: TimedService(cfg.validate()).run())
    final = load_latest(out)
    return {"exit_code": code, "seconds": total, "restore_seconds": spent["restore"],
            "snapshot_seconds": spent["snapshot"], "owner_wait_seconds": spent["owner_wait"],
            "events_applied": final.counters.events_applied if final else None,
            "events_rejected": final.counters.events_rejected if final else None}


def e2e_run(kafka, kind: str, values: list[bytes], events: int, snapshot: Path, folder: Path) -> dict:
    """Produce (untimed), then time the service from the snapshot to the end of the topic."""
    from ranktide.stream.events import ARROW_CONTENT_TYPE

    topic = f"bench-{kind}"
    kafka.create_topic(topic, partitions=3)
    headers = [("content-type", ARROW_CONTENT_TYPE.encode())] if kind == "arrow" else None
    _say(f"end to end: producing {len(values):,} {kind} messages ({events:,} events)")
    produce(kafka.bootstrap, topic, values, headers)
    out = folder / f"e2e-{kind}"
    shutil.copytree(snapshot, out / snapshot.name)
    _say(f"end to end: service consuming {topic}")
    r = timed_service(f"kafka://{kafka.bootstrap}/{topic}", out)
    busy = r["seconds"] - r["restore_seconds"] - r["snapshot_seconds"] - r["owner_wait_seconds"]
    r.update({"messages": len(values), "events": events, "events_per_second": events / r["seconds"],
              "events_per_second_excluding_restore_and_snapshots": events / busy if busy > 0 else None})
    return r


def warm_group_coordinator(bootstrap: str) -> None:
    """Commit one offset in a throwaway group, so the broker's first group setup is not timed."""
    from confluent_kafka import Consumer, TopicPartition

    consumer = Consumer({"bootstrap.servers": bootstrap, "group.id": "bench-warm-up"})
    consumer.commit(offsets=[TopicPartition("bench-warm-up", 0, 0)], asynchronous=False)
    consumer.close()


def measure_e2e(edges: EdgeSet, sampler: PowerLawSampler, count: int, snapshot: Path,
                folder: Path, rng: np.random.Generator) -> dict:
    """The service end to end on a local broker, JSON messages then Arrow IPC batches."""
    try:
        from ranktide.stream.broker import LocalKafka
    except ImportError:
        return {"skipped": "no broker"}
    batch = e2e_events(edges, sampler, count, rng)
    kafka = LocalKafka()
    try:
        _say("end to end: starting a local Kafka broker")
        kafka.start()
        kafka.create_topic("bench-warm-up", partitions=1)
        warm_group_coordinator(kafka.bootstrap)
    except Exception as exc:  # noqa: BLE001 - any failure to start means no broker here
        kafka.stop()
        return {"skipped": f"no broker: {exc}".splitlines()[0][:300]}
    try:
        return {"json": e2e_run(kafka, "json", json_messages(batch), count, snapshot, folder),
                "arrow": e2e_run(kafka, "arrow", arrow_messages(batch), count, snapshot, folder),
                "arrow_rows_per_message": ARROW_ROWS}
    finally:
        kafka.stop()
