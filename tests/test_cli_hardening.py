"""What a user meets first: last records without a newline, outputs that cannot be
written, bad options, malformed CSV rows, help lines and the example configuration.

Every command runs as a child process of the real command line. The checks are
on observable behaviour: exit codes (README: 2 bad input or environment, 3 an
output that cannot be written), one line on stderr without a traceback, and the
events a snapshot counts. Scores are checked against NetworkX ``pagerank`` on
the graph the log implies.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow.parquet as pq
import pytest

from stream_helpers import newest_snapshot, ranktide, wait_for

REPO = Path(__file__).resolve().parents[1]
EVENTS = [
    {"op": "insert", "src": "a", "dst": "b"},
    {"op": "insert", "src": "b", "dst": "c", "weight": 2.0},
    {"op": "insert", "src": "c", "dst": "a"},
    {"op": "insert", "src": "c", "dst": "d"},
]


def _lines(events: list[dict]) -> bytes:
    return b"\n".join(json.dumps(e).encode() for e in events)


def _run(*args: str, timeout: float = 120, env: dict | None = None) -> subprocess.CompletedProcess:
    """Run the command line to its end; return the completed process (text output)."""
    proc = ranktide(*args, env=env)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        out, err = proc.communicate()
        raise AssertionError(f"ranktide {' '.join(args)} did not finish in {timeout} s: {err.decode()[-2000:]}")
    return subprocess.CompletedProcess(proc.args, proc.returncode, out.decode(), err.decode())


def _one_line_error(done: subprocess.CompletedProcess, code: int, *words: str) -> str:
    """The run ended with ``code`` and one error line on stderr (no traceback) naming ``words``."""
    assert done.returncode == code, (done.returncode, done.stderr[-3000:])
    assert "Traceback" not in done.stderr, done.stderr[-3000:]
    errors = [ln for ln in done.stderr.splitlines() if "error" in ln.lower()]
    assert len(errors) == 1, done.stderr[-3000:]
    for word in words:
        assert word in errors[0], errors[0]
    return errors[0]


def _networkx_scores(events: list[dict]) -> dict[str, float]:
    """Reference: NetworkX ``pagerank`` of the graph the inserts build."""
    g = nx.DiGraph()
    for e in events:
        g.add_edge(e["src"], e["dst"], weight=e.get("weight", 1.0))
    return nx.pagerank(g, alpha=0.85, tol=1e-13, max_iter=10_000)


def _global_scores(snap: Path) -> dict[str, float]:
    rows = pq.read_table(snap / "scores.parquet").to_pylist()
    return {r["node"]: r["score"] for r in rows if r["profile"] == "global"}


def _manifest(snap: Path) -> dict:
    return json.loads((snap / "manifest.json").read_text())


# ---------------------------------------------------------------- item 3: a last line without newline


def test_run_stop_at_end_applies_a_last_record_without_newline(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))  # no newline after the last record
    root = tmp_path / "snaps"
    done = _run("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end",
                "--quiet", "--tolerance", "1e-6", timeout=60)
    assert done.returncode == 0, done.stderr[-3000:]
    snap = newest_snapshot(root)
    assert _manifest(snap)["events_applied"] == len(EVENTS)
    ours, ref = _global_scores(snap), _networkx_scores(EVENTS)
    assert set(ours) == set(ref)
    assert sum(abs(ours[n] - ref[n]) for n in ref) <= 1e-6


def test_a_followed_file_keeps_a_partial_line_until_it_is_complete(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    whole = _lines(EVENTS[:3]) + b"\n"
    last = json.dumps(EVENTS[3]).encode()
    log.write_bytes(whole + last[:10])
    root = tmp_path / "snaps"
    proc = ranktide("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "",
                    "--snapshot-interval", "0.2", "--quiet", "--tolerance", "1e-6")

    def covered() -> int:
        if not root.is_dir() or not any(p.name.startswith("snap-") for p in root.iterdir()):
            return -1
        m = _manifest(newest_snapshot(root))
        return m["events_applied"] + m["events_rejected"]

    wait_for(lambda: covered() == 3, what="a snapshot of the three complete lines")
    assert _manifest(newest_snapshot(root))["events_rejected"] == 0  # the half line was not taken
    with open(log, "ab") as fh:
        fh.write(last[10:])  # complete the record, still without a newline: the file may grow on
    # a followed file never ends: the record waits for its newline
    with open(log, "ab") as fh:
        fh.write(b"\n")
    wait_for(lambda: covered() == 4, what="a snapshot that includes the completed line")
    proc.terminate()
    assert proc.wait(60) == 0
    snap = newest_snapshot(root)
    assert _manifest(snap)["events_rejected"] == 0
    ref = _networkx_scores(EVENTS)
    ours = _global_scores(snap)
    assert sum(abs(ours[n] - ref[n]) for n in ref) <= 1e-6


def test_replay_applies_a_last_record_without_newline(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    done = _run("replay", str(log), "--out", str(tmp_path / "snaps"), "--quiet")
    assert done.returncode == 0, done.stderr
    assert _manifest(newest_snapshot(tmp_path / "snaps"))["events_applied"] == len(EVENTS)


def test_the_replay_command_does_not_import_pandas_but_a_callers_process_keeps_it(tmp_path: Path) -> None:
    """pyarrow imports pandas on its first conversion when pandas is installed (0.3 s of a replay's start).

    The program hides it; ``main(argv)`` in a caller's process does not. Import
    record: Python's own ``PYTHONPROFILEIMPORTTIME`` (``-X importtime``).
    """
    pytest.importorskip("pandas")  # installed by the test extras: the case worth checking
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    done = _run("replay", str(log), "--out", str(tmp_path / "snaps"), "--quiet",
                env={**os.environ, "PYTHONPROFILEIMPORTTIME": "1"})
    assert done.returncode == 0, done.stderr[-3000:]
    imported = {ln.rsplit("|", 1)[-1].strip() for ln in done.stderr.splitlines() if ln.startswith("import time:")}
    assert "pyarrow" in imported and "numba" in imported  # the record is there
    # a refused 'import pandas' leaves a line of its own too; a real one loads pandas' submodules
    assert not {m for m in imported if m.startswith("pandas.")}
    assert _global_scores(newest_snapshot(tmp_path / "snaps")) == pytest.approx(_networkx_scores(EVENTS), abs=1e-3)

    code = subprocess.run([sys.executable, "-c", (
        "import sys; from ranktide.stream.cli import main\n"
        f"assert main(['replay', {str(log)!r}, '--out', {str(tmp_path / 'again')!r}, '--quiet']) == 0\n"
        "import pandas, pyarrow as pa\n"
        "print(pa.array(pandas.Series([1.5])).type)")], capture_output=True, text=True, timeout=120)
    assert code.returncode == 0 and code.stdout.strip() == "double", code.stderr[-3000:]


# ---------------------------------------------------------------- item 4: outputs, options, exit codes


@pytest.fixture
def small_log(tmp_path: Path) -> Path:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS) + b"\nnot json\n")
    return log


def _run_file(log: Path, root: Path | str, *extra: str) -> subprocess.CompletedProcess:
    return _run("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end",
                "--quiet", *extra)


def test_run_into_an_impossible_root_exits_3(small_log: Path) -> None:
    _one_line_error(_run_file(small_log, "/proc/x/snaps"), 3, "/proc/x")


def test_demo_into_an_impossible_folder_exits_3() -> None:
    _one_line_error(_run("demo", "--out", "/proc/x"), 3, "/proc/x")


def test_run_with_an_impossible_rejects_file_exits_3(small_log: Path, tmp_path: Path) -> None:
    _one_line_error(_run_file(small_log, tmp_path / "snaps", "--rejects", "/proc/x/r.jsonl"), 3, "/proc/x/r.jsonl")


def test_rejects_file_prefix_names_the_path(small_log: Path, tmp_path: Path) -> None:
    target = tmp_path / "bad" / "r.jsonl"
    proc = ranktide("run", "--source", f"file:{small_log}", "--out", str(tmp_path / "snaps"), "--metrics", "",
                    "--stop-at-end", "--quiet", "--rejects", f"file:{target}", cwd=tmp_path)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 0, err.decode()
    rejects = [json.loads(line) for line in target.read_text().splitlines()]
    assert [r["line"] for r in rejects] == [5]
    assert not [p for p in tmp_path.rglob("*") if p.name.startswith("file:")]


def test_audit_with_an_impossible_plot_exits_3_before_the_work(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    assert _run("replay", str(log), "--out", str(tmp_path / "snaps"), "--quiet").returncode == 0
    done = _run("audit", str(tmp_path / "snaps"), "--plot", "/proc/x/a.png")
    _one_line_error(done, 3, "/proc/x")
    assert "audit of" not in done.stdout  # refused before the recompute


@pytest.mark.parametrize("args, words", [
    (["--micro-batch", "0"], ["--micro-batch"]),
    (["--metrics", "notaport"], ["--metrics", "notaport"]),
    (["--metrics", "127.0.0.1:99999"], ["--metrics"]),
    (["--keep-snapshots", "0"], ["--keep-snapshots"]),
    (["--tolerance", "x"], ["--tolerance", "'x'"]),
    (["--damping", "1.5"], ["--damping"]),
    (["--snapshot-interval", "-1"], ["--snapshot-interval"]),
])
def test_bad_run_options_are_one_line_exit_2(small_log: Path, tmp_path: Path, args: list[str], words: list[str]) -> None:
    line = _one_line_error(_run_file(small_log, tmp_path / "snaps", *args), 2, *words)
    assert "_positive" not in line and "_damping" not in line and "invalid" not in line
    assert not (tmp_path / "snaps").exists()


@pytest.mark.parametrize("setting, value", [("micro_batch", "0"), ("metrics", "notaport"), ("poll_records", "-5")])
def test_bad_settings_from_the_environment_are_one_line_exit_2(small_log: Path, tmp_path: Path, setting: str,
                                                              value: str) -> None:
    done = _run("run", "--source", f"file:{small_log}", "--out", str(tmp_path / "snaps"), "--stop-at-end",
                env={f"RANKTIDE_{setting.upper()}": value})
    _one_line_error(done, 2, setting)


def test_replay_into_an_impossible_folder_exits_3(small_log: Path) -> None:
    _one_line_error(_run("replay", str(small_log), "--out", "/proc/x/snaps", "--quiet"), 3, "/proc/x")


def test_replay_onto_a_full_disk_exits_3_and_leaves_no_half_snapshot(tiny_disk: Path, tmp_path: Path) -> None:
    log = tmp_path / "big.jsonl"
    rng = np.random.default_rng(3)
    ids = [f"{v:016x}" for v in rng.integers(0, 2**62, 60_000)]  # incompressible: far more than 512 KiB
    log.write_text("".join(json.dumps({"op": "insert", "src": ids[i], "dst": ids[(i * 7919) % len(ids)]}) + "\n"
                           for i in range(len(ids))))
    root = tiny_disk / "snaps"
    _one_line_error(_run("replay", str(log), "--out", str(root), "--quiet"), 3, "No space left on device")
    assert not [p for p in root.iterdir() if p.name.startswith("snap-") or p.name.endswith(".partial")]


# ---------------------------------------------------------------- item 5: CSV rows


def test_malformed_csv_rows_are_rejected_one_by_one(tmp_path: Path) -> None:
    log = tmp_path / "events.csv"
    log.write_text("op,src,dst,weight,ts\n"
                   "insert,a,b,1.0,\n"
                   "insert,b\n"                         # line 3: two columns
                   "insert,b,c,2.0,\n"
                   "insert,c,a,1.0,,extra,cells\n"      # line 5: seven columns
                   "insert,c,d,1.0,\n"
                   "insert\n")                          # line 7: one column, at the end
    root = tmp_path / "snaps"
    done = _run("replay", str(log), "--out", str(root), "--quiet", "--tolerance", "1e-6")
    assert done.returncode == 0, done.stderr
    rejects = [json.loads(line) for line in (root / "rejects.jsonl").read_text().splitlines()]
    lines = [r["line"] for r in rejects]
    assert lines == [3, 5, 7]
    assert all(r["source"].endswith("events.csv") and "columns" in r["reason"] for r in rejects)
    assert rejects[0]["record"] == "insert,b"
    m = _manifest(newest_snapshot(root))
    assert (m["events_applied"], m["events_rejected"]) == (3, 3)
    good = [{"src": "a", "dst": "b"}, {"src": "b", "dst": "c", "weight": 2.0}, {"src": "c", "dst": "d"}]
    ref, ours = _networkx_scores(good), _global_scores(newest_snapshot(root))
    assert sum(abs(ours[n] - ref[n]) for n in ref) <= 1e-6


# ---------------------------------------------------------------- item 4: unreachable brokers


def _closed_port() -> int:
    """A loopback port where nothing listens (bound, then released)."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.parametrize("command", ["run", "record"])
def test_unreachable_brokers_give_one_error_after_the_connect_timeout(tmp_path: Path, command: str) -> None:
    port = _closed_port()
    url = f"kafka://127.0.0.1:{port}/edges"
    if command == "run":
        args = ["run", "--source", url, "--out", str(tmp_path / "snaps"), "--metrics", "", "--connect-timeout", "3"]
    else:
        args = ["record", "--source", url, "--out", str(tmp_path / "log.parquet"), "--connect-timeout", "3"]
    started = time.monotonic()
    done = _run(*args, timeout=120)
    _one_line_error(done, 2, f"127.0.0.1:{port}", "3 s")
    assert time.monotonic() - started < 60
    assert len(done.stderr.splitlines()) <= 12, done.stderr  # librdkafka's retries are not all printed


def test_connect_timeout_comes_from_the_environment_and_configuration(tmp_path: Path) -> None:
    from ranktide.stream.config import ConfigError, load_config

    cfg_file = tmp_path / "ranktide.toml"
    cfg_file.write_text('source = "kafka://127.0.0.1:1/edges"\nconnect_timeout = 7.5\n')
    assert load_config(cfg_file, env={}).connect_timeout == 7.5
    assert load_config(cfg_file, env={"RANKTIDE_CONNECT_TIMEOUT": "2"}).connect_timeout == 2.0
    with pytest.raises(ConfigError, match="connect_timeout"):
        load_config(cfg_file, env={"RANKTIDE_CONNECT_TIMEOUT": "0"})


def test_malformed_csv_rows_across_many_chunks_keep_their_lines_and_resume(tmp_path: Path) -> None:
    rng = np.random.default_rng(9)
    bad_lines = sorted({int(x) for x in rng.integers(3, 150_000, 12)} | {2, 150_001})
    rows, events = ["op,src,dst,weight,ts"], []
    for line in range(2, 150_002):
        if line in bad_lines:
            rows.append(f"insert,x{line}")
        else:
            src, dst = f"n{int(rng.integers(3000))}", f"n{int(rng.integers(3000))}"
            rows.append(f"insert,{src},{dst},1.0,")
            events.append({"src": src, "dst": dst})
    log = tmp_path / "events.csv"
    log.write_text("\n".join(rows) + "\n")
    whole = tmp_path / "whole"
    assert _run("replay", str(log), "--out", str(whole), "--quiet").returncode == 0
    rejects = [json.loads(line) for line in (whole / "rejects.jsonl").read_text().splitlines()]
    assert [r["line"] for r in rejects] == bad_lines
    assert all(r["record"] == f"insert,x{r['line']}" for r in rejects)
    m = _manifest(newest_snapshot(whole))
    assert (m["events_applied"], m["events_rejected"]) == (len(events), len(bad_lines))
    # resumed from a snapshot taken part way: the same final snapshot
    part = tmp_path / "part"
    assert _run("replay", str(log), "--out", str(part), "--until", "70000", "--quiet").returncode == 0
    first = newest_snapshot(part)
    assert _run("replay", str(log), "--out", str(part), "--from", str(first), "--quiet").returncode == 0
    assert _manifest(newest_snapshot(part))["events_applied"] == len(events)
    assert (pq.read_table(newest_snapshot(part) / "edges.parquet")
            .equals(pq.read_table(newest_snapshot(whole) / "edges.parquet")))


# ---------------------------------------------------------------- item 7: help, log level, version, example


READING_COMMANDS = {"status", "top", "score", "snapshots"}  # their help lines are checked with them


def test_every_command_and_option_has_a_help_line() -> None:
    import argparse

    from ranktide.stream.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    described = {a.dest: a.help for a in sub._choices_actions}
    missing = [name for name in sub.choices if not described.get(name)]
    for name, command in sub.choices.items():
        if name in READING_COMMANDS:
            continue
        missing += [f"{name} {'/'.join(a.option_strings) or a.dest}" for a in command._actions
                    if not a.help or a.help == argparse.SUPPRESS]
    missing += [f"ranktide {'/'.join(a.option_strings)}" for a in parser._actions
                if a.option_strings and not a.help]
    assert not missing, missing


def test_replay_help_mentions_the_snapshot_series() -> None:
    done = _run("replay", "--help")
    assert done.returncode == 0
    text = " ".join(done.stdout.split())
    assert "--snapshot-every" in text and "series" in text


def test_log_level_after_the_command_and_unknown_levels(tmp_path: Path) -> None:
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    root = tmp_path / "snaps"
    quiet = _run("run", "--source", f"file:{log}", "--out", str(root), "--metrics", "", "--stop-at-end", "--quiet",
                 "--log-level", "warning")
    assert quiet.returncode == 0, quiet.stderr
    assert " INFO " not in quiet.stderr
    loud = _run("--log-level", "INFO", "replay", str(log), "--out", str(tmp_path / "r"), "--log-level", "DEBUG")
    assert loud.returncode == 0, loud.stderr
    for args in (["--log-level", "LOUD", "replay", str(log), "--out", str(tmp_path / "x")],
                 ["replay", str(log), "--out", str(tmp_path / "x"), "--log-level", "LOUD"]):
        _one_line_error(_run(*args), 2, "--log-level", "LOUD", "DEBUG, INFO, WARNING, ERROR")
    assert not (tmp_path / "x").exists()


def test_version() -> None:
    from importlib.metadata import version

    done = _run("--version")
    assert done.returncode == 0
    assert done.stdout.strip() == f"ranktide {version('ranktide')}"


def test_the_example_configuration_is_complete_and_loads_with_the_real_loader() -> None:
    import dataclasses
    import tomllib

    from ranktide.stream.config import ServiceConfig, load_config

    example = REPO / "stream" / "ranktide.example.toml"
    keys = set(tomllib.loads(example.read_text(encoding="utf-8")))
    assert keys == {f.name for f in dataclasses.fields(ServiceConfig)}  # every setting, nothing unknown
    cfg = load_config(example, env={})
    defaults = ServiceConfig()
    for f in dataclasses.fields(ServiceConfig):
        if f.name != "source":
            assert getattr(cfg, f.name) == getattr(defaults, f.name), f.name  # it states the defaults
    assert cfg.source.startswith("kafka://")
    assert "ranktide.example.toml" in (REPO / "README.md").read_text(encoding="utf-8")


# ---------------------------------------------------------------- item 4: bench on the base install

BLOCKER = '''
import sys

class Blocker:
    """Make the bench extras look uninstalled: their import fails as if they were missing."""

    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("igraph", "networkx", "onadata", "orjson"):
            raise ModuleNotFoundError(f"No module named {name!r}")
        return None

sys.meta_path.insert(0, Blocker())
'''


def test_bench_without_the_extras_runs_what_is_installed_and_names_the_rest(tmp_path: Path) -> None:
    (tmp_path / "sitecustomize.py").write_text(BLOCKER)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tmp_path), os.environ.get("PYTHONPATH", "")])}
    probe = subprocess.run([sys.executable, "-c", "import igraph"], env=env, capture_output=True, text=True)
    assert probe.returncode != 0  # the blocker is active in the child
    cmd = [sys.executable, "-m", "ranktide.stream.cli", "bench", "--size", "tiny", "--batches", "1,10",
           "--repeats", "1", "--profiles", "0", "--json", "--skip-e2e"]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "Traceback" not in done.stderr
    report = json.loads(done.stdout)
    assert set(report["missing_contenders"]) == {"networkx", "igraph_prpack"}
    for name in ("networkx", "igraph"):
        assert f"{name} is not installed" in done.stderr and "pip install" in done.stderr
    rows = report["batches"]
    assert [r["batch"] for r in rows] == [1, 10]
    assert all("warm_start" in r and "networkx" not in r and "igraph_prpack" not in r for r in rows)
    assert all(r["ranktide"]["max_error"] <= r["ranktide"]["max_certified_bound"] + 1e-10 for r in rows)
    assert "skipped" in report["real_graph"]
    command = report["replay"]["command"]  # the replay is measured, its orjson floor named as missing
    assert command["orjson_floor_seconds"] is None and command["ratio"] is None
    assert command["events_applied"] == command["events"]
    assert "orjson is not installed" in done.stderr


def test_replay_whose_rejects_fill_the_disk_exits_3(tiny_disk: Path, tmp_path: Path) -> None:
    log = tmp_path / "bad.jsonl"
    log.write_text("".join(f'{{"op": "insert", "src": "node-{i:08d}-without-a-destination"}}\n' for i in range(20_000)))
    _one_line_error(_run("replay", str(log), "--out", str(tiny_disk / "snaps"), "--quiet"), 3,
                    "rejects file", "No space left on device")


# ---------------------------------------------------------------- issue 11: a lean start-up

HEAVY = ("numba", "numpy", "pyarrow", "scipy", "confluent_kafka", "matplotlib", "ranktide.solver",
         "ranktide.replay.bench")


@pytest.mark.parametrize("argv", [["--help"], ["bench", "--help"], ["run", "--help"], ["status", "ROOT"]])
def test_start_up_imports_no_heavy_module(tmp_path: Path, argv: list[str]) -> None:
    """``--help`` and ``status`` answer without NumPy, pyarrow, numba or the benchmark (a fast start-up)."""
    log = tmp_path / "events.jsonl"
    log.write_bytes(_lines(EVENTS))
    assert _run("replay", str(log), "--out", str(tmp_path / "snaps"), "--quiet").returncode == 0
    argv = [str(tmp_path / "snaps") if a == "ROOT" else a for a in argv]
    code = ("import contextlib, io, sys\n"
            "from ranktide.stream.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()) as out:\n"
            "    try:\n"
            f"        code = main({argv!r})\n"
            "    except SystemExit as exc:\n"
            "        code = exc.code\n"
            "heavy = sorted(m for m in sys.modules if m in " + repr(HEAVY) + " or m.startswith(" + repr(tuple(h + '.' for h in HEAVY)) + "))\n"
            "print(code, len(out.getvalue()), *heavy)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    exit_code, printed, *heavy = done.stdout.split()
    assert exit_code in ("0", "None") and int(printed) > 0
    assert heavy == [], heavy


def test_librdkafka_lines_are_rate_limited() -> None:
    """The filter on librdkafka's log lets one line of a kind through per period and counts the rest."""
    import logging

    from ranktide.stream.sources import KAFKA_LOG, RateLimited

    limiter = RateLimited(every=3600)

    def record(text: str) -> logging.LogRecord:
        return logging.LogRecord("ranktide.kafka", logging.ERROR, __file__, 1, text, (), None)

    kept = [r for r in (record(f"FAIL 127.0.0.1:{9000 + i}: Connect failed after {i}ms") for i in range(580))
            if limiter.filter(r)]
    assert len(kept) == 1  # the same message with other numbers is the same kind
    assert limiter.filter(record("another kind of failure"))
    limiter._last = {k: v - 7200 for k, v in limiter._last.items()}  # the period has passed
    again = record("FAIL 127.0.0.1:9999: Connect failed after 5ms")
    assert limiter.filter(again) and "579 more like it not shown" in again.getMessage()
    assert any(isinstance(f, RateLimited) for f in KAFKA_LOG.filters)
    assert KAFKA_LOG.level == logging.WARNING
