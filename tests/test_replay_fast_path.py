"""The fast path of a JSON Lines replay: whole chunks through Arrow's JSON reader, a reader thread.

A log is read in chunks; a clean chunk goes to Arrow's JSON reader as one
buffer, a chunk that needs care (a bad, blank or CRLF line) line by line.
Whatever the path, the events, their order and each reject's line must be
those of the log read line by line with Python's own ``json`` module (the
outside reference here). The reader thread that parses ahead must hand over
its errors and stop when the replay stops early.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from ranktide.replay.replay import ReplayOptions, Timings, _Prefetched, replay_log
from ranktide.stream.events import OPS
from ranktide.stream.logs import LogError, read_log

#: Lines that are not valid events, each with a word its reason must hold.
BAD_LINES = {
    b"not json": "not JSON",
    b'{"op": "move", "src": "a", "dst": "b"}': "unknown op",
    b'{"op": "insert", "dst": "b"}': "missing field 'src'",
    b'{"op": "insert", "src": "a", "dst": "b", "weight": -1}': "weight",
    b'["insert", "a", "b"]': "not a JSON object",
}


def _good_line(rng: np.random.Generator) -> bytes:
    u, v = rng.integers(0, 50, size=2)
    if rng.random() < 0.2:
        return json.dumps({"op": "delete", "src": f"n{u}", "dst": f"n{v}"}).encode()
    event = {"op": "insert", "src": f"n{u}", "dst": f"n{v}"}
    if rng.random() < 0.5:
        event["weight"] = float(rng.integers(1, 8)) / 2
    return json.dumps(event).encode()


def _log(rng: np.random.Generator, lines: int, bad_every: int) -> list[bytes]:
    """Good lines, with a bad one (cycling through BAD_LINES) every ``bad_every`` lines in the first half."""
    bad = list(BAD_LINES)
    out = []
    for i in range(lines):
        if i < lines // 2 and i % bad_every == bad_every - 1:
            out.append(bad[(i // bad_every) % len(bad)])
        else:
            out.append(_good_line(rng))
    return out


def _reference(lines: list[bytes]) -> tuple[list[tuple], list[int]]:
    """(op, src, dst, weight) of every valid line and the line numbers of the bad ones, by Python's json."""
    events, bad = [], []
    for number, raw in enumerate(lines, 1):
        if not raw.strip():
            continue
        if raw.rstrip(b"\r") in BAD_LINES:
            bad.append(number)
            continue
        e = json.loads(raw)
        events.append((OPS[e["op"]], e["src"], e["dst"], float(e.get("weight", 1.0))))
    return events, bad


def _read(path: Path, chunk_bytes: int) -> tuple[list[tuple], list[int], list[str], list[str]]:
    """Events, reject lines, reject reasons and reject texts as read_log gives them."""
    events, bad, reasons, texts = [], [], [], []
    for chunk in read_log(path, chunk_bytes=chunk_bytes):
        b = chunk.parsed.batch
        events += list(zip(b.op.tolist(), b.src.to_pylist(), b.dst.to_pylist(), b.weight.tolist()))
        bad += chunk.lines[chunk.parsed.rejected_rows].tolist()
        reasons += chunk.parsed.reasons
        texts += [chunk.raw(int(r)) for r in chunk.parsed.rejected_rows]
    return events, bad, reasons, texts


@pytest.mark.parametrize("newline", [b"\n", b"\r\n"])
def test_clean_and_dirty_chunks_give_the_events_of_a_line_by_line_read(tmp_path: Path, newline: bytes) -> None:
    rng = np.random.default_rng(3)
    lines = _log(rng, 3_000, bad_every=97)
    if newline == b"\n":
        lines.insert(1_700, b"")  # a blank line in the clean half: no record, but it counts as a line
    path = tmp_path / "events.jsonl"
    path.write_bytes(newline.join(lines))  # the last line without its newline
    want_events, want_bad = _reference(lines)
    for chunk_bytes in (4_096, 50_000, 1 << 23):  # many chunks (clean ones among them), a few, one
        events, bad, reasons, texts = _read(path, chunk_bytes)
        assert events == want_events, chunk_bytes
        assert bad == want_bad, chunk_bytes
        for number, reason, text in zip(bad, reasons, texts):
            assert BAD_LINES[lines[number - 1]] in reason, (number, reason)
            assert text.rstrip("\r") == lines[number - 1].decode(), number


def test_replay_rejects_name_every_bad_line_and_apply_every_good_one(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    lines = _log(rng, 2_000, bad_every=61)
    path = tmp_path / "events.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    want_events, want_bad = _reference(lines)
    summary = replay_log(path, tmp_path / "root", ReplayOptions())
    assert summary.counters.events_applied == len(want_events)
    assert summary.counters.events_rejected == len(want_bad)
    rejects = [json.loads(x) for x in (tmp_path / "root" / "rejects.jsonl").read_text().splitlines()]
    assert [r["line"] for r in rejects] == want_bad
    # the final edge set, by replaying the reference events into a dict
    edges: dict[tuple[str, str], float] = {}
    for op, src, dst, weight in want_events:
        if op == OPS["insert"]:
            edges[(src, dst)] = weight
        else:
            edges.pop((src, dst), None)
    table = pq.read_table(summary.snapshot / "edges.parquet")
    got = dict(zip(zip(table["src"].to_pylist(), table["dst"].to_pylist()), table["weight"].to_pylist()))
    assert got == edges
    # rows sorted by (src, dst) as Python orders the names' UTF-8 bytes
    pairs = list(zip(table["src"].to_pylist(), table["dst"].to_pylist()))
    assert pairs == sorted(pairs, key=lambda p: (p[0].encode(), p[1].encode()))


def _readers() -> list[threading.Thread]:
    return [t for t in threading.enumerate() if t.name == "replay-reader"]


def test_the_reader_thread_stops_when_the_consumer_leaves_early() -> None:
    def endless():
        i = 0
        while True:
            yield i
            i += 1

    chunks = _Prefetched(endless(), Timings(), depth=2)
    got = [next(chunks) for _ in range(5)]
    chunks.close()
    assert got == [0, 1, 2, 3, 4]
    assert not _readers()


def test_the_reader_thread_parses_before_the_first_chunk_is_asked_for() -> None:
    """The first chunks are parsed while the replay builds its engine and loads its kernels."""
    pulled = threading.Event()

    def source():
        pulled.set()
        yield "first"

    chunks = _Prefetched(source(), Timings())
    try:
        assert pulled.wait(timeout=30), "the reader did not start until asked for a chunk"
        assert list(chunks) == ["first"]
    finally:
        chunks.close()
    assert not _readers()


def test_a_replay_whose_set_up_fails_leaves_no_reader_thread(tmp_path: Path) -> None:
    path = tmp_path / "events.jsonl"
    path.write_bytes(b'{"op":"insert","src":"a","dst":"b"}\n' * 700_000)  # 25 MiB: more chunks than the queue holds
    missing = ReplayOptions(personalizations={"trusted": tmp_path / "no-such-seeds.txt"})
    with pytest.raises(LogError, match="no-such-seeds"):
        replay_log(path, tmp_path / "root", missing)
    assert not _readers()


def test_a_reader_error_is_raised_where_its_chunk_would_have_come() -> None:
    def broken():
        yield "first"
        raise LogError("events.jsonl: cannot read: disk on fire")

    chunks = _Prefetched(broken(), Timings())
    assert next(chunks) == "first"
    with pytest.raises(LogError, match="disk on fire"):
        next(chunks)
    assert not _readers()


def test_until_stops_a_many_chunk_replay_at_its_line(tmp_path: Path) -> None:
    rng = np.random.default_rng(9)
    lines = [_good_line(rng) for _ in range(200_000)]  # about 8 MiB: more than one chunk
    path = tmp_path / "events.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    summary = replay_log(path, tmp_path / "root", ReplayOptions(until=1_234))
    assert summary.counters.events_applied == 1_234
    manifest = json.loads((summary.snapshot / "manifest.json").read_text())
    assert manifest["positions"]["files"][str(path.resolve())]["line"] == 1_234
    assert not _readers()


def test_the_replay_command_writes_every_output_before_it_ends(tmp_path: Path) -> None:
    """The command line ends a replay without the interpreter's teardown: nothing may be lost by it."""
    lines = _log(np.random.default_rng(11), 500, bad_every=101)
    path = tmp_path / "events.jsonl"
    path.write_bytes(b"\n".join(lines))
    want_events, want_bad = _reference(lines)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}  # output to pipes is block-buffered
    done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "--log-level", "DEBUG", "replay", str(path),
                           "--out", str(tmp_path / "root")], capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    assert f"events applied {len(want_events):,}" in done.stdout
    assert f"events rejected {len(want_bad):,} (see" in done.stdout
    assert done.stdout.rstrip().splitlines()[-1].startswith("time")  # the summary's last line
    assert "replay timing: read+parse" in done.stderr  # the log handler was flushed too
    rejects = (tmp_path / "root" / "rejects.jsonl").read_text().splitlines()
    assert [json.loads(r)["line"] for r in rejects] == want_bad
    missing = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "replay", str(tmp_path / "nope.jsonl"),
                              "--out", str(tmp_path / "other")], capture_output=True, text=True, timeout=300)
    assert missing.returncode == 2 and "no such log file" in missing.stderr
