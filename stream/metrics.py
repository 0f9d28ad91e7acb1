"""Service metrics in the Prometheus text exposition format, served over HTTP with the read API."""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ranktide.stream.api import ReadApi

log = logging.getLogger("ranktide.metrics")


@dataclass
class Metrics:
    """Counters and gauges of one service process."""

    events_applied: int = 0
    events_rejected: int = 0
    push_edges: int = 0
    feed_sent: int = 0
    snapshots: int = 0
    snapshot_seconds: float = 0.0
    last_snapshot: float = 0.0  # Unix time of the newest snapshot (written or restored); 0: none
    records_since_snapshot: int = 0  # records read that no snapshot covers yet
    bounds: dict[str, float] = field(default_factory=dict)
    rtol_reached: dict[str, float] = field(default_factory=dict)
    lag: dict[str, int] = field(default_factory=dict)
    recompute_last: float = 0.0
    recompute_seconds: float = 0.0
    recompute_ok: int | None = None
    recompute_total: int = 0
    recompute_failures: int = 0
    recompute_error: dict[str, float] = field(default_factory=dict)
    recompute_relative_error: dict[str, float] = field(default_factory=dict)
    api_requests: int = 0
    api_cpu_seconds: float = 0.0
    _api_lock: threading.Lock = field(default_factory=threading.Lock)
    _rate_window: list[tuple[float, int, int]] = field(default_factory=list)

    def record_batch(self, applied: int, rejected: int) -> None:
        self.events_applied += applied
        self.events_rejected += rejected
        now = time.monotonic()
        self._rate_window.append((now, self.events_applied, self.events_rejected))
        self._rate_window = [w for w in self._rate_window if now - w[0] <= 60.0]

    def record_snapshot(self, seconds: float, created: float) -> None:
        """A snapshot written in ``seconds``, stamped ``created`` (Unix time), covering every record read."""
        # the count first: a scrape between the two never pairs the new time with old records
        self.records_since_snapshot = 0
        self.last_snapshot = created
        self.snapshot_seconds = seconds
        self.snapshots += 1

    def record_request(self, cpu_seconds: float) -> None:
        """One read API request answered, with the CPU time its thread spent on it."""
        with self._api_lock:
            self.api_requests += 1
            self.api_cpu_seconds += cpu_seconds

    def rates(self) -> tuple[float, float]:
        """Events applied and rejected per second over the last minute."""
        if len(self._rate_window) < 2:
            return 0.0, 0.0
        (t0, a0, r0), (t1, a1, r1) = self._rate_window[0], self._rate_window[-1]
        span = max(t1 - t0, 1e-9)
        return (a1 - a0) / span, (r1 - r0) / span

    def render(self) -> str:
        applied_rate, rejected_rate = self.rates()
        lines = [
            "# HELP ranktide_events_applied_total Valid events applied (no-ops included).",
            "# TYPE ranktide_events_applied_total counter",
            f"ranktide_events_applied_total {self.events_applied}",
            "# HELP ranktide_events_rejected_total Malformed records sent to the rejects sink.",
            "# TYPE ranktide_events_rejected_total counter",
            f"ranktide_events_rejected_total {self.events_rejected}",
            "# HELP ranktide_events_applied_per_second Events applied per second, last minute.",
            "# TYPE ranktide_events_applied_per_second gauge",
            f"ranktide_events_applied_per_second {applied_rate:.3f}",
            "# HELP ranktide_events_rejected_per_second Records rejected per second, last minute.",
            "# TYPE ranktide_events_rejected_per_second gauge",
            f"ranktide_events_rejected_per_second {rejected_rate:.3f}",
            "# HELP ranktide_push_edges_total Edges touched by pushes and sweeps.",
            "# TYPE ranktide_push_edges_total counter",
            f"ranktide_push_edges_total {self.push_edges}",
            "# HELP ranktide_score_feed_messages_total Messages sent on the score-change feed.",
            "# TYPE ranktide_score_feed_messages_total counter",
            f"ranktide_score_feed_messages_total {self.feed_sent}",
            "# HELP ranktide_api_requests_total Read API requests answered (any status).",
            "# TYPE ranktide_api_requests_total counter",
            f"ranktide_api_requests_total {self.api_requests}",
            "# HELP ranktide_api_cpu_seconds_total CPU time the listener's threads spent answering the read API.",
            "# TYPE ranktide_api_cpu_seconds_total counter",
            f"ranktide_api_cpu_seconds_total {self.api_cpu_seconds:.6f}",
            "# HELP ranktide_certified_bound Certified bound on the normalised L1 error.",
            "# TYPE ranktide_certified_bound gauge",
        ]
        lines += [f'ranktide_certified_bound{{profile="{p}"}} {b:.6g}' for p, b in sorted(self.bounds.items())]
        lines += [
            "# HELP ranktide_rtol_reached Largest certified relative error of the last snapshot's scores "
            "(per-node contract; the K best nodes of a personalization).",
            "# TYPE ranktide_rtol_reached gauge",
        ]
        lines += [f'ranktide_rtol_reached{{profile="{p}"}} {b:.6g}' for p, b in sorted(self.rtol_reached.items())]
        lines += [
            "# HELP ranktide_consumer_lag Records not yet read, per partition (or bytes, per file).",
            "# TYPE ranktide_consumer_lag gauge",
        ]
        lines += [f'ranktide_consumer_lag{{partition="{k}"}} {v}' for k, v in sorted(self.lag.items())]
        age = time.time() - self.last_snapshot if self.last_snapshot else float("nan")
        stamp = self.last_snapshot if self.last_snapshot else float("nan")
        lines += [
            "# HELP ranktide_snapshot_age_seconds Seconds since the newest snapshot was written (restored ones count).",
            "# TYPE ranktide_snapshot_age_seconds gauge",
            f"ranktide_snapshot_age_seconds {age:.3f}",
            "# HELP ranktide_snapshot_timestamp_seconds Unix time of the newest snapshot (its manifest's created_at).",
            "# TYPE ranktide_snapshot_timestamp_seconds gauge",
            f"ranktide_snapshot_timestamp_seconds {stamp:.3f}",
            "# HELP ranktide_records_since_snapshot Records read that no snapshot covers yet (0 when idle and saved).",
            "# TYPE ranktide_records_since_snapshot gauge",
            f"ranktide_records_since_snapshot {self.records_since_snapshot}",
            "# HELP ranktide_snapshot_duration_seconds Time the last snapshot took.",
            "# TYPE ranktide_snapshot_duration_seconds gauge",
            f"ranktide_snapshot_duration_seconds {self.snapshot_seconds:.3f}",
            "# HELP ranktide_snapshots_total Snapshots written by this process.",
            "# TYPE ranktide_snapshots_total counter",
            f"ranktide_snapshots_total {self.snapshots}",
        ]
        return "\n".join(lines + self._recompute_lines()) + "\n"

    def _recompute_lines(self) -> list[str]:
        """The periodic full recomputes (``recompute_interval``)."""
        lines = [
            "# HELP ranktide_recompute_total Periodic full recomputes finished.",
            "# TYPE ranktide_recompute_total counter",
            f"ranktide_recompute_total {self.recompute_total}",
            "# HELP ranktide_recompute_failures_total Recomputes that failed or found a score outside both bounds.",
            "# TYPE ranktide_recompute_failures_total counter",
            f"ranktide_recompute_failures_total {self.recompute_failures}",
        ]
        if self.recompute_ok is None:
            return lines
        lines += [
            "# HELP ranktide_recompute_last_timestamp_seconds When the last recompute finished (Unix time).",
            "# TYPE ranktide_recompute_last_timestamp_seconds gauge",
            f"ranktide_recompute_last_timestamp_seconds {self.recompute_last:.3f}",
            "# HELP ranktide_recompute_duration_seconds Time the last recompute and audit took.",
            "# TYPE ranktide_recompute_duration_seconds gauge",
            f"ranktide_recompute_duration_seconds {self.recompute_seconds:.3f}",
            "# HELP ranktide_recompute_ok 1 when every score of the last audited snapshot lay within both bounds.",
            "# TYPE ranktide_recompute_ok gauge",
            f"ranktide_recompute_ok {self.recompute_ok}",
            "# HELP ranktide_recompute_error Measured normalised L1 drift of the scores from the last recompute.",
            "# TYPE ranktide_recompute_error gauge",
        ]
        lines += [f'ranktide_recompute_error{{profile="{p}"}} {v:.6g}' for p, v in sorted(self.recompute_error.items())]
        lines += [
            "# HELP ranktide_recompute_relative_error Largest measured relative drift of the certified nodes.",
            "# TYPE ranktide_recompute_relative_error gauge",
        ]
        lines += [f'ranktide_recompute_relative_error{{profile="{p}"}} {v:.6g}'
                  for p, v in sorted(self.recompute_relative_error.items())]
        return lines


def start_metrics_server(address: str, metrics: Metrics, api: "ReadApi | None" = None) -> ThreadingHTTPServer | None:
    """Serve ``GET /metrics`` (and the read API's paths) on ``HOST:PORT`` in a daemon thread.

    Port 0 picks a free one. Other methods than GET and HEAD get 405, a
    request with a body 413.
    """
    host, _, port = address.rpartition(":")

    class Handler(BaseHTTPRequestHandler):
        protocol_version = "HTTP/1.1"  # keep-alive: a poller reuses its connection
        timeout = 10  # seconds an idle or slow connection may hold its thread
        disable_nagle_algorithm = True  # headers and body go out in two writes: no 40 ms delayed-ACK wait

        def _send(self, status: int, body: bytes, content_type: str, headers: dict, head: bool) -> None:
            self.send_response(status)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.send_header("Cache-Control", "no-store")
            for key, value in headers.items():
                self.send_header(key, value)
            self.end_headers()
            if not head:
                self.wfile.write(body)

        def _get(self, head: bool) -> None:
            if self.headers.get("Content-Length", "0").strip() != "0" or self.headers.get("Transfer-Encoding"):
                self.close_connection = True
                self._send(413, b'{"error":"a GET takes no body","status":413}\n', "application/json", {}, head)
                return
            path = self.path.split("?")[0]
            if path in ("/metrics", "/"):
                body = metrics.render().encode()
                self._send(200, body, "text/plain; version=0.0.4; charset=utf-8", {}, head)
            elif api is not None:
                started = time.thread_time()
                r = api.handle(self.path, self.headers)
                self._send(r.status, r.body, r.content_type, r.headers, head)
                metrics.record_request(time.thread_time() - started)
            else:
                self._send(404, b"only /metrics is served\n", "text/plain; charset=utf-8", {}, head)

        def do_GET(self) -> None:  # noqa: N802 - the http.server name
            self._get(head=False)

        def do_HEAD(self) -> None:  # noqa: N802
            self._get(head=True)

        def _refuse(self) -> None:
            self.close_connection = True
            self._send(405, b'{"error":"only GET and HEAD are served","status":405}\n', "application/json",
                       {"Allow": "GET, HEAD"}, False)

        do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _refuse  # noqa: N815

        def log_message(self, fmt: str, *args) -> None:
            log.debug(fmt, *args)

    try:
        server = ThreadingHTTPServer((host or "127.0.0.1", int(port)), Handler)
    except OSError as exc:
        log.warning("metrics endpoint %s not started: %s", address, exc)
        return None
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True, name="metrics").start()
    log.info("metrics%s on http://%s:%d/", " and read API" if api is not None else "", *server.server_address[:2])
    return server
