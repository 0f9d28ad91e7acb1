"""The read API of ``ranktide run``, asked with a real HTTP client (``http.client``).

The service runs as a child process on a file source that grows while it is
asked. References: every answer names the source position it reflects, and
its scores are checked against NetworkX ``pagerank`` on the graph of exactly
the records before that position (so a half-applied batch would show), its
rank ranges against the ranks of that exact solution, and, once caught up,
against the snapshot written at the same position. Rank ranges are also
checked against a brute-force count from their definition (design notes,
section 4b). Waits are on observable conditions (answers, files), never
fixed sleeps.
"""

from __future__ import annotations

import http.client
import json
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from ranktide.solver.ids import NodeIds
from ranktide.solver.bounds import ranks_between
from stream_helpers import CHILDREN, Stream, ranktide

TOLERANCE = 1e-6


# ------------------------------------------------------------------ helpers


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def get(port: int, path: str, token: str | None = None, method: str = "GET",
        body: bytes | None = None) -> tuple[int, dict, dict | str]:
    """One request; (status, headers, parsed JSON body or text)."""
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    try:
        headers = {"Authorization": f"Bearer {token}"} if token else {}
        conn.request(method, path, body=body, headers=headers)
        resp = conn.getresponse()
        raw = resp.read()
        hdrs = {k.lower(): v for k, v in resp.getheaders()}
        if hdrs.get("content-type", "").startswith("application/json"):
            return resp.status, hdrs, json.loads(raw)
        return resp.status, hdrs, raw.decode()
    finally:
        conn.close()


def wait_for(fn, timeout: float = 90.0, what: str = "condition"):
    """Call ``fn`` until it returns something true; return that."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            value = fn()
        except (ConnectionError, OSError):
            value = None
        if value:
            return value
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


def start(log: Path, root: Path, port: int, *extra: str, env: dict | None = None) -> subprocess.Popen:
    """``ranktide run`` on ``log``, small polls, frequent settles and views, API on ``port``."""
    proc = ranktide("run", "--source", f"file:{log}", "--out", str(root), "--metrics", f"127.0.0.1:{port}",
                    "--snapshot-interval", "0.3", "--tolerance", str(TOLERANCE), *extra,
                    env={"RANKTIDE_FILE_CHUNK_BYTES": "4096", "RANKTIDE_SETTLE_INTERVAL": "0.02",
                         "RANKTIDE_API_VIEW_INTERVAL": "0", **(env or {})})
    return proc


def stop(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err.decode()[-3000:]


def append(log: Path, stream: Stream, start_at: int) -> None:
    with open(log, "ab") as fh:
        fh.write(b"".join(value + b"\n" for _, value in stream.records[start_at:]))


def exact_at(log: Path, offset: int, damping: float = 0.85) -> dict[str, float]:
    """NetworkX ``pagerank`` of the graph made by the log's records before byte ``offset``."""
    edges: dict[tuple[str, str], float] = {}
    nodes: set[str] = set()
    with open(log, "rb") as fh:
        data = fh.read(offset)
    for line in data.splitlines():
        rec = json.loads(line)
        nodes.update((rec["src"], rec["dst"]))
        if rec["op"] == "insert":
            edges[(rec["src"], rec["dst"])] = rec.get("weight", 1.0)
        else:
            edges.pop((rec["src"], rec["dst"]), None)
    g = nx.DiGraph()
    g.add_nodes_from(nodes)
    g.add_weighted_edges_from((s, d, w) for (s, d), w in edges.items())
    return nx.pagerank(g, alpha=damping, tol=1e-13, max_iter=10_000)


def offset_of(answer: dict, log: Path) -> int:
    return answer["positions"]["files"][str(log.resolve())]["offset"]


#: The reference's own error: NetworkX stops once an iteration moves the vector by less
#: than N * tol in L1 (tol 1e-13 here), and rounding adds to it.
REFERENCE_SLACK = 1e-9


def check_against_exact(rows: list[dict], exact: dict[str, float]) -> None:
    """Each score within its bound of the exact one; the exact rank inside the rank range."""
    values = np.array(sorted(exact.values()))
    for row in rows:
        x = exact[row["node"]]
        assert abs(row["score"] - x) <= row["bound"] + REFERENCE_SLACK, row
        # ranks the exact solution allows, with the reference's slack
        above = values.size - np.searchsorted(values, x + REFERENCE_SLACK, side="right")
        at_least = values.size - np.searchsorted(values, x - REFERENCE_SLACK, side="left")
        assert row["rank"]["best"] <= at_least and 1 + above <= row["rank"]["worst"], (row, above, at_least)


# ------------------------------------------------------------------ answers while events stream in


def test_answers_match_the_exact_scores_of_the_positions_they_name(tmp_path: Path) -> None:
    rng = np.random.default_rng(21)
    stream = Stream()
    stream.extend(rng, 4000, n_nodes=800, bad_share=0.0)
    log = tmp_path / "events.jsonl"
    append(log, stream, 0)
    root, port = tmp_path / "snaps", _free_port()
    proc = start(log, root, port)
    answers: list[dict] = []
    written = [len(stream.records)]

    def writer() -> None:  # two more bursts while the service works
        for _ in range(2):
            done = len(stream.records)
            stream.extend(rng, 3000, n_nodes=800, bad_share=0.0)
            append(log, stream, done)
            written.append(len(stream.records))

    wait_for(lambda: get(port, "/v1/top?k=5")[0] == 200, what="a first answer")
    feeder = threading.Thread(target=writer)
    feeder.start()
    size = lambda: log.stat().st_size  # noqa: E731
    deadline = time.monotonic() + 180
    while True:
        assert time.monotonic() < deadline, "the service did not catch up"
        status, _, top = get(port, "/v1/top?k=8")
        assert status == 200, top
        if top["top"]:
            answers.append(top)
            nodes = [r["node"] for r in top["top"][:3]]
            query = "&".join(f"node={n}" for n in nodes)
            status, _, scores = get(port, f"/v1/scores?{query}")
            assert status == 200, scores
            answers.append(scores)
        if not feeder.is_alive() and answers and offset_of(answers[-1], log) == size():
            break
    feeder.join()
    offsets = sorted({offset_of(a, log) for a in answers})
    assert len([o for o in offsets if o < size()]) >= 3, offsets  # answers taken mid-stream
    checked = 0
    for off in offsets[:: max(len(offsets) // 12, 1)] + [offsets[-1]]:
        exact = exact_at(log, off)
        for a in (a for a in answers if offset_of(a, log) == off):
            rows = a.get("top") or a.get("scores")
            assert a["certified_l1_bound"] <= TOLERANCE
            assert a["nodes"] == len(exact)
            check_against_exact(rows, exact)
            checked += len(rows)
    assert checked >= 30

    # caught up: the answer agrees with the snapshot written at the same position
    last_top = get(port, "/v1/top?k=20")[2]
    nodes = [r["node"] for r in last_top["top"]]
    live = get(port, "/v1/scores?" + "&".join(f"node={n}" for n in nodes))[2]
    pos = live["positions"]

    def snapshot_at_position() -> Path | None:
        for snap in sorted(root.glob("snap-*"), reverse=True):
            try:
                manifest = json.loads((snap / "manifest.json").read_text())
            except (OSError, ValueError):
                continue
            if {"files": manifest["positions"].get("files")} == pos:
                return snap
        return None

    snap = wait_for(snapshot_at_position, what="a snapshot at the answer's position")
    manifest = json.loads((snap / "manifest.json").read_text())
    import pyarrow.parquet as pq

    table = pq.read_table(snap / "scores.parquet").to_pylist()
    snapped = {r["node"]: r["score"] for r in table if r["profile"] == "global"}
    assert manifest["events_applied"] == live["events_applied"] == len(stream.records)
    for row in live["scores"]:
        assert abs(row["score"] - snapped[row["node"]]) <= row["bound"] + manifest["certified_bound"]["global"]
    status, _, st = get(port, "/v1/status")
    assert status == 200 and st["nodes"] == manifest["nodes"] and st["edges"] == manifest["edges"]
    assert st["events_applied"] == manifest["events_applied"] and st["positions"] == pos
    assert st["ready"] is True and st["last_snapshot"]["name"].startswith("snap-")
    stop(proc)


# ------------------------------------------------------------------ refusals and limits


@pytest.fixture(scope="module")
def guarded(tmp_path_factory) -> tuple[int, str]:
    """A service with a token and small limits, caught up on a small log."""
    folder = tmp_path_factory.mktemp("guarded")
    stream = Stream()
    stream.extend(np.random.default_rng(5), 2000, n_nodes=300, bad_share=0.0)
    log = folder / "events.jsonl"
    append(log, stream, 0)
    port, token = _free_port(), "s3cret-token"
    proc = start(log, folder / "snaps", port, env={
        "RANKTIDE_API_TOKEN": token, "RANKTIDE_API_MAX_K": "50", "RANKTIDE_API_MAX_NODES": "5",
        "RANKTIDE_API_MAX_REQUEST_BYTES": "512"})
    CHILDREN.remove(proc)  # it serves the whole module, not one test: stopped below
    try:
        wait_for(lambda: get(port, "/readyz")[0] == 200, what="readiness")
        yield port, token
        stop(proc)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)


def _error(port: int, path: str, token: str | None, status: int, **kwargs) -> dict:
    got, headers, body = get(port, path, token, **kwargs)
    assert got == status, (path, got, body)
    assert headers["content-type"] == "application/json"
    assert body["status"] == status and body["error"]
    return body


def test_token_is_required_on_the_read_paths(guarded: tuple[int, str]) -> None:
    port, token = guarded
    for path in ("/v1/top", "/v1/status", "/v1/scores?node=v1"):
        _error(port, path, None, 401)
        _error(port, path, "wrong", 401)
    assert get(port, "/v1/top", None)[1]["www-authenticate"].startswith("Bearer")
    assert get(port, "/v1/top?k=3", token)[0] == 200
    assert get(port, "/healthz")[0] == 200 and get(port, "/readyz")[0] == 200  # probes need no token
    assert get(port, "/metrics")[0] == 200


def test_unknown_things_are_404(guarded: tuple[int, str]) -> None:
    port, token = guarded
    body = _error(port, "/v1/scores?node=no-such-node&node=v1", token, 404)
    assert body["unknown"] == ["no-such-node"]
    body = _error(port, "/v1/top?profile=nobody", token, 404)
    assert body["profiles"] == ["global"]
    _error(port, "/v1/nothing", token, 404)


@pytest.mark.parametrize("path", [
    "/v1/scores", "/v1/scores?node=", "/v1/top?k=0", "/v1/top?k=51", "/v1/top?k=ten", "/v1/top?k=1&k=2",
    "/v1/top?colour=red", "/v1/scores?node=a&node=b&node=c&node=d&node=e&node=f", "/healthz?x=1",
])
def test_bad_parameters_are_400(guarded: tuple[int, str], path: str) -> None:
    port, token = guarded
    _error(port, path, token, 400)


def test_limits_on_k_nodes_and_request_size(guarded: tuple[int, str]) -> None:
    port, token = guarded
    status, _, top = get(port, "/v1/top?k=50", token)
    assert status == 200 and len(top["top"]) == 50
    five = [r["node"] for r in top["top"][:5]]
    status, _, scores = get(port, "/v1/scores?" + "&".join(f"node={n}" for n in five), token)
    assert status == 200 and [r["node"] for r in scores["scores"]] == five
    _error(port, "/v1/scores?node=" + "x" * 600, token, 414)
    _error(port, "/v1/top", token, 405, method="POST", body=b"{}")
    _error(port, "/v1/top", token, 413, body=b"k=3")


def test_a_non_loopback_listener_without_token_is_refused(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_text('{"op": "insert", "src": "a", "dst": "b"}\n')
    done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "run", "--source", f"file:{log}",
                           "--out", str(tmp_path / "snaps"), "--metrics", "0.0.0.0:9", "--stop-at-end"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert "non-loopback" in done.stderr and "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
    from ranktide.stream.config import ConfigError, load_config

    base = {"source": f"file:{log}", "metrics": "10.0.0.1:9464"}
    with pytest.raises(ConfigError):
        load_config(env={}, overrides=base)
    assert load_config(env={"RANKTIDE_API_TOKEN": "t"}, overrides=base).api_token == "t"
    assert load_config(env={}, overrides={**base, "api_allow_no_token": True}).api_allow_no_token
    assert load_config(env={}, overrides={**base, "metrics": "127.0.0.2:9464"}).metrics
    assert "t" not in json.dumps(load_config(env={"RANKTIDE_API_TOKEN": "t"}, overrides=base).redacted()["api_token"])


# ------------------------------------------------------------------ probes


def test_readiness_follows_lag_and_health_follows_the_loop(tmp_path: Path) -> None:
    stream = Stream()
    stream.extend(np.random.default_rng(8), 1500, n_nodes=300, bad_share=0.0)
    log = tmp_path / "events.jsonl"
    append(log, stream, 0)
    partial = b'{"op": "insert", "src": "late", "dst": "v1"}'
    with open(log, "ab") as fh:
        fh.write(partial[:10])  # half a line: left unread, so the lag stays at its 10 bytes
    port = _free_port()
    proc = start(log, tmp_path / "snaps", port, "--ready-max-lag", "0")
    body = wait_for(lambda: (lambda r: r[2] if r[2].get("lag") == 10 and r[2]["phase"] == "running" else None)(
        get(port, "/readyz")), what="the backlog read up to the half line")
    status, headers, body = get(port, "/readyz")
    assert status == 503 and body["ready"] is False and body["reasons"] == ["lag 10 above 0"]
    assert headers["content-type"] == "application/json"
    status, _, health = get(port, "/healthz")
    assert status == 200 and health["status"] == "ok"
    turns = health["loop_turns"]
    wait_for(lambda: get(port, "/healthz")[2]["loop_turns"] > turns, what="the loop to turn")
    with open(log, "ab") as fh:
        fh.write(partial[10:] + b"\n")
    wait_for(lambda: get(port, "/readyz")[0] == 200, what="ready once the line is complete")
    status, _, scores = get(port, "/v1/scores?node=late")
    assert status == 200 and scores["scores"][0]["node"] == "late"
    stop(proc)


# ------------------------------------------------------------------ pieces, against their definitions


def test_rank_ranges_match_a_brute_force_count() -> None:
    rng = np.random.default_rng(3)
    for n in (1, 2, 7, 200):
        s = rng.random(n)
        s[: n // 3] = s[0]  # ties
        b = rng.random(n) * rng.choice([0.0, 0.01, 0.3])
        lo, hi = s - b, s + b
        best, worst = ranks_between(np.sort(lo), np.sort(hi), lo, hi)
        for v in range(n):
            others = np.arange(n) != v
            assert best[v] == 1 + np.sum(lo > hi[v])
            assert worst[v] == 1 + np.sum((hi >= lo[v]) & others)
            assert 1 <= best[v] <= worst[v] <= n


def test_frozen_ids_ignore_names_interned_later() -> None:
    import pyarrow as pa

    ids = NodeIds([f"n{i}" for i in range(100)])
    frozen = ids.frozen()
    ids.intern(pa.array([f"m{i}" for i in range(5000)]))  # grows and rehashes the live table
    assert [frozen.lookup(f"n{i}") for i in range(100)] == list(range(100))
    assert frozen.lookup("m1") is None and frozen.lookup("zz") is None
    assert frozen.name(42) == "n42" and len(frozen) == 100
    small = NodeIds(["a", "b"])
    early = small.frozen()
    small.intern(pa.array(["c", "d"]))  # same arrays, new cells
    assert early.lookup("c") is None and early.lookup("b") == 1 and small.lookup("c") == 2


def test_no_state_yet_and_a_stalled_loop_are_503() -> None:
    """The listener itself (same code as in ``ranktide run``) before a state is published, asked over HTTP."""
    from ranktide.stream.api import ApiSettings, LiveState, ReadApi
    from ranktide.stream.metrics import Metrics, start_metrics_server

    live = LiveState(phase="restoring")
    server = start_metrics_server("127.0.0.1:0", Metrics(), ReadApi(live, ApiSettings(stall_seconds=0.5)))
    port = server.server_address[1]
    try:
        for path in ("/v1/top", "/v1/scores?node=a", "/v1/status"):
            body = _error(port, path, None, 503)
            assert "restoring" in body["error"]
            assert get(port, path)[1]["retry-after"] == "1"
        status, _, ready = get(port, "/readyz")
        assert status == 503 and "not serving yet (restoring)" in ready["reasons"]
        assert get(port, "/healthz")[0] == 200
        live.last_turn -= 1.0  # the loop has not turned for a second, above stall_seconds
        status, _, health = get(port, "/healthz")
        assert status == 503 and health["status"] == "stalled"
    finally:
        server.shutdown()
        server.server_close()
