"""What the read API costs the engine: ``ranktide run`` with and without 200 requests a second.

A generated graph is written as a snapshot and a JSON Lines log of mixed
events after it, then the service (in this process, as ``ranktide run
--stop-at-end``, in a thread) replays the log from the snapshot while a
reader in another process sends ``GET /v1/top?k=20`` and ``GET /v1/scores``
(three nodes) at a fixed rate over one kept-alive connection, switched on
and off every ``--window`` seconds. Each chunk the service applies is timed
(interning, apply, settles, view publication) and falls into the window in
which it ends; the engine's events per second are compared between adjacent
windows with and without the reader, so that the shared machine's load,
which drifts over seconds, weighs on both alike. Also shown: the CPU time the
listener's threads spent answering (``ranktide_api_cpu_seconds_total``), and
the reader's achieved rate, status counts and latencies.

Run it with ``python -m ranktide.replay.bench_read_api --help``.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import shutil
import socket
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from ranktide.replay.bench_common import SIZES, _say, machine_info
from ranktide.replay.bench_end_to_end import e2e_events, json_messages
from ranktide.replay.bench_engine import measure_snapshot
from ranktide.replay.bench_workloads import generated, load_graph, warm_up_kernels

#: Events in the log, per size (the run lasts about events / 100,000 s on medium).
EVENTS = {"tiny": 200_000, "small": 3_000_000, "medium": 5_000_000, "large": 5_000_000}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _Client:
    """A lean HTTP/1.1 keep-alive client (raw socket), so that the reader's own CPU use stays small.

    The reader shares the machine with the service; http.client costs about
    three times as much CPU per request.
    """

    def __init__(self, port: int) -> None:
        self.port = port
        self.sock: socket.socket | None = None
        self.buf = b""

    def get(self, path: str) -> int:
        if self.sock is None:
            self.sock = socket.create_connection(("127.0.0.1", self.port), timeout=30)
            self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self.buf = b""
        self.sock.sendall(f"GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n".encode())
        while b"\r\n\r\n" not in self.buf:
            self._more()
        head, _, self.buf = self.buf.partition(b"\r\n\r\n")
        length = 0
        for line in head.split(b"\r\n")[1:]:
            name, _, value = line.partition(b":")
            if name.strip().lower() == b"content-length":
                length = int(value)
        while len(self.buf) < length:
            self._more()
        self.buf = self.buf[length:]
        return int(head.split(b" ", 2)[1])

    def _more(self) -> None:
        data = self.sock.recv(1 << 16)
        if not data:
            raise ConnectionError("closed")
        self.buf += data

    def close(self) -> None:
        if self.sock is not None:
            self.sock.close()
        self.sock = None


def reader(port: int, rate: float, n_nodes: int, ready, active, stop, results) -> None:
    """While ``active`` is set, send requests at ``rate`` per second; on ``stop``, put a summary on ``results``.

    ``ready`` is set once this process has started.
    """
    rng = np.random.default_rng(7)
    client = _Client(port)
    statuses: dict[int, int] = {}
    latencies: list[float] = []
    sent = 0
    busy = 0.0
    cpu0 = time.process_time()
    ready.set()
    while not stop.is_set():
        if not active.wait(0.05):
            continue
        began = next_at = time.monotonic()
        while active.is_set() and not stop.is_set():
            path = ("/v1/scores?" + "&".join(f"node={i}" for i in rng.integers(n_nodes, size=3))) if sent % 2 \
                else "/v1/top?k=20"
            t0 = time.monotonic()
            try:
                status = client.get(path)
                statuses[status] = statuses.get(status, 0) + 1
                latencies.append(time.monotonic() - t0)
            except OSError:
                statuses[0] = statuses.get(0, 0) + 1  # not listening yet, or closed
                client.close()
            sent += 1
            next_at += 1.0 / rate
            time.sleep(max(next_at - time.monotonic(), 0.0))
        busy += time.monotonic() - began
    lat = sorted(latencies) or [float("nan")]
    results.put({"requests": sent, "active_seconds": busy, "rate": sent / busy if busy else 0.0,
                 "cpu_ms_per_request": 1e3 * (time.process_time() - cpu0) / max(sent, 1),
                 "statuses": {str(k): v for k, v in sorted(statuses.items())},
                 "latency_p50_ms": 1e3 * lat[len(lat) // 2], "latency_p99_ms": 1e3 * lat[int(0.99 * (len(lat) - 1))]})


def timed_service(log: Path, snapshot: Path, out: Path, port: int):
    """A service from ``snapshot`` to the end of ``log`` that records (end time, engine s, events) per chunk."""
    from ranktide.stream.config import ServiceConfig
    from ranktide.stream.service import Service

    class TimedService(Service):
        def __init__(self, config: ServiceConfig) -> None:
            super().__init__(config)
            self.chunks: list[tuple[float, float, int]] = []
            self.publish_seconds = 0.0
            self.views = 0

        def _apply(self, chunk):  # noqa: D401 - same contract as Service._apply
            started = time.perf_counter()
            try:
                return super()._apply(chunk)
            finally:
                ended = time.perf_counter()
                self.chunks.append((ended, ended - started, len(chunk.parsed.batch)))

        def _publish(self, certificates=None):
            started = time.perf_counter()
            try:
                return super()._publish(certificates)
            finally:
                self.publish_seconds += time.perf_counter() - started
                self.views += 1

    if out.exists():
        shutil.rmtree(out)
    shutil.copytree(snapshot, out / snapshot.name)
    cfg = ServiceConfig(source=f"file:{log}", out=str(out), stop_at_end=True, snapshot_interval=3600,
                        metrics=f"127.0.0.1:{port}")
    return TimedService(cfg.validate())


def windows_of(chunks: list[tuple[float, float, int]], edges: list[float], kinds: list[bool]) -> list[dict]:
    """Engine events per second in each window ``[edges[i], edges[i+1])`` (chunks by their end time)."""
    out = []
    ends = np.array([c[0] for c in chunks])
    for i in range(len(edges) - 1):
        inside = [c for c, e in zip(chunks, ends) if edges[i] <= e < edges[i + 1]]
        seconds = sum(c[1] for c in inside)
        events = sum(c[2] for c in inside)
        if events and seconds > 0:
            out.append({"reader": kinds[i], "events": events, "engine_seconds": seconds,
                        "engine_events_per_second": events / seconds})
    return out


def measure(size: str, window: float, rate: float, seed: int, folder: Path) -> dict:
    """One service run over the log with the reader switched on and off every ``window`` seconds."""
    warm_up_kernels()
    _say(f"read API cost: generating and loading the {size} graph")
    src, dst, sampler, info = generated(size, seed)
    loaded = load_graph(SIZES[size][0], src, dst, np.ones(src.size), sampler)
    _, snap = measure_snapshot(loaded.engine, folder / "base")
    count = EVENTS[size]
    _say(f"read API cost: writing {count:,} events")
    batch = e2e_events(loaded.edges, sampler, count, np.random.default_rng(seed + 3))
    log = folder / "events.jsonl"
    log.write_bytes(b"\n".join(json_messages(batch)) + b"\n")
    n_nodes = loaded.engine.n_nodes
    del loaded, batch
    port = _free_port()
    ctx = mp.get_context("spawn")
    ready, active, stop, results = ctx.Event(), ctx.Event(), ctx.Event(), ctx.Queue()
    proc = ctx.Process(target=reader, args=(port, rate, n_nodes, ready, active, stop, results), daemon=True)
    proc.start()
    if not ready.wait(120):
        raise RuntimeError("the reader process did not start")
    service = timed_service(log, snap, folder / "run", port)
    outcome: dict = {}
    def run() -> None:
        try:
            outcome["code"] = service.run()
        except Exception as exc:  # noqa: BLE001 - reported with the figures
            outcome["error"] = f"{type(exc).__name__}: {exc}"

    runner = threading.Thread(target=run, name="service")
    _say(f"read API cost: replaying, reader switched every {window:g} s")
    began = time.perf_counter()
    runner.start()
    edges, kinds = [], []
    on = False
    while runner.is_alive():
        edges.append(time.perf_counter())
        kinds.append(on)
        active.set() if on else active.clear()
        runner.join(window)
        on = not on
    edges.append(time.perf_counter())
    active.clear()
    stop.set()
    summary = results.get(timeout=60)
    proc.join(30)
    rows = windows_of(service.chunks, edges, kinds)[1:]  # the first window holds the restore
    pairs = [(a, b) for a, b in zip(rows, rows[1:]) if a["reader"] != b["reader"]]
    ratios = [(b if b["reader"] else a)["engine_events_per_second"] / (a if b["reader"] else b)[
        "engine_events_per_second"] for a, b in pairs]
    with_r = [r["engine_events_per_second"] for r in rows if r["reader"]]
    without = [r["engine_events_per_second"] for r in rows if not r["reader"]]
    seconds = time.perf_counter() - began
    return {
        "machine": machine_info(), "graph": info, "events": count, "reader_rate": rate, "window_seconds": window,
        "exit_code": outcome.get("code"), "error": outcome.get("error"), "seconds": seconds, "windows": rows, "reader": summary,
        "engine_events_per_second_without_reader": statistics.median(without) if without else None,
        "engine_events_per_second_with_reader": statistics.median(with_r) if with_r else None,
        "adjacent_ratio_median": statistics.median(ratios) if ratios else None,
        "adjacent_ratio_quartiles": [float(q) for q in np.percentile(ratios, [25, 75])] if ratios else None,
        "slowdown_percent": 100.0 * (1.0 - statistics.median(ratios)) if ratios else None,
        "api_requests": service.metrics.api_requests, "api_cpu_seconds": service.metrics.api_cpu_seconds,
        "api_cpu_ms_per_request": 1e3 * service.metrics.api_cpu_seconds / max(service.metrics.api_requests, 1),
        "views_published": service.views, "publish_seconds": service.publish_seconds,
    }


def render(r: dict) -> str:
    rd = r["reader"]
    pct = r["slowdown_percent"]
    lines = [
        f"Read API cost on the {r['graph']['size']} graph ({r['graph']['nodes']:,} nodes, {r['graph']['edges']:,} "
        f"edges): ranktide run replaying {r['events']:,} events ({r['seconds']:.0f} s), a reader at "
        f"{r['reader_rate']:g} requests/s (GET /v1/top?k=20 and /v1/scores of 3 nodes, alternately) switched "
        f"on and off every {r['window_seconds']:g} s",
        f"  engine events/s, median of windows: {r['engine_events_per_second_without_reader'] or 0:,.0f} without "
        f"the reader, {r['engine_events_per_second_with_reader'] or 0:,.0f} with",
        f"  with / without, adjacent windows: median {r['adjacent_ratio_median'] or float('nan'):.3f} "
        f"(quartiles {', '.join(f'{q:.3f}' for q in r['adjacent_ratio_quartiles'] or [])}): "
        + (f"{pct:+.1f} % slower" if pct is not None else "no pairs"),
        f"  answering: {r['api_requests']:,} requests, {r['api_cpu_ms_per_request']:.3f} ms CPU each in the "
        f"listener's threads; {r['views_published']} views published, {1e3 * r['publish_seconds']:.1f} ms in all",
        f"  reader: {rd['rate']:.0f} requests/s while on ({rd['cpu_ms_per_request']:.3f} ms CPU each, same "
        f"machine), statuses {rd['statuses']}, latency p50 "
        f"{rd['latency_p50_ms']:.2f} ms, p99 {rd['latency_p99_ms']:.2f} ms",
    ]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m ranktide.replay.bench_read_api",
                                description="Engine events/s of ranktide run with and without a reader "
                                            "of the read API (alternating windows of one run).")
    p.add_argument("--size", choices=list(SIZES), default="medium", help="generated graph (default medium)")
    p.add_argument("--window", type=float, default=2.0, help="seconds between switching the reader (default 2)")
    p.add_argument("--rate", type=float, default=200.0, help="reader requests per second (default 200)")
    p.add_argument("--seed", type=int, default=0, help="seed of the graph and events (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    args = p.parse_args(argv)
    if args.window <= 0 or args.rate <= 0:
        p.error("--window and --rate must be > 0")
    with tempfile.TemporaryDirectory(prefix="ranktide-read-api-") as tmp:
        report = measure(args.size, args.window, args.rate, args.seed, Path(tmp))
    print(json.dumps(report, indent=1, default=float) if args.json else render(report))
    return 0


if __name__ == "__main__":
    sys.exit(main())
