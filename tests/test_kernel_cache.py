"""Orders of first commands on a fresh compiled-kernel cache never crash a later process.

numba caches compiled kernels on disk (``NUMBA_CACHE_DIR``). A cached kernel
that called the ``parallel=True`` scatter could be reloaded in a later process
without numba starting its threading layer, and that process died with SIGSEGV
on its first global sweep, then on every start (issue: hardening, item 1).
Each sequence below runs as child processes sharing one empty cache folder,
in an order that once crashed or could, and every process must exit 0.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

#: Builds a graph big enough that settling from zero needs global sweeps, then
#: calls one engine entry point (``resolve``, ``settle`` or ``audit``-like work).
ENGINE_SCRIPT = """
import sys
import numpy as np
from ranktide import Engine

rng = np.random.default_rng(0)
m = 20_000
engine = Engine()
engine.apply(np.zeros(m, np.int8), rng.integers(0, 2_000, m), rng.integers(0, 2_000, m), np.ones(m))
if sys.argv[1] == "resolve":
    engine.resolve()
else:
    engine.settle()
    engine.settle(1e-9)
print(engine.certified_bound())
"""


@pytest.fixture()
def log(tmp_path: Path) -> Path:
    """A JSON Lines log whose first settle needs global sweeps (20,000 edges on 2,000 nodes)."""
    rng = np.random.default_rng(5)
    path = tmp_path / "events.jsonl"
    with open(path, "w") as fh:
        for u, v in zip(rng.integers(0, 2_000, 20_000), rng.integers(0, 2_000, 20_000)):
            fh.write(json.dumps({"op": "insert", "src": f"n{u}", "dst": f"n{v}"}) + "\n")
    return path


def _child(args: list[str], cache: Path, threads: int | None = None) -> subprocess.CompletedProcess:
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    env.pop("NUMBA_NUM_THREADS", None)
    if threads is not None:
        env["NUMBA_NUM_THREADS"] = str(threads)
    return subprocess.run([sys.executable, *args], env=env, capture_output=True, text=True, timeout=600)


def _cli(*args: str) -> list[str]:
    return ["-m", "ranktide.stream.cli", "--log-level", "WARNING", *args]


def _run_in_order(steps: list[tuple[list[str], int | None]], cache: Path) -> None:
    for i, (args, threads) in enumerate(steps):
        done = _child(args, cache, threads)
        assert done.returncode == 0, (
            f"step {i + 1} ({' '.join(args[-6:])}, threads={threads}) exited {done.returncode}:\n"
            f"{done.stderr[-2000:]}")


def test_replay_audit_then_two_runs(log: Path, tmp_path: Path) -> None:
    """The order of the issue: replay, audit, run, run (the second run once died with 139)."""
    cache = tmp_path / "cache"
    src = f"file:{log}"
    _run_in_order([
        (_cli("replay", str(log), "--out", str(tmp_path / "A")), None),
        (_cli("audit", str(tmp_path / "A")), None),
        (_cli("run", "--source", src, "--out", str(tmp_path / "B"), "--stop-at-end"), None),
        (_cli("run", "--source", src, "--out", str(tmp_path / "C"), "--stop-at-end"), None),
        (_cli("run", "--source", src, "--out", str(tmp_path / "D"), "--stop-at-end"), 1),
    ], cache)


def test_resolve_first_then_settles_in_new_processes(tmp_path: Path) -> None:
    """The smaller form: ``resolve`` in one process, ``settle`` in the next ones, both thread counts."""
    cache = tmp_path / "cache"
    script = ["-c", ENGINE_SCRIPT]
    _run_in_order([
        (script + ["resolve"], None),
        (script + ["settle"], None),
        (script + ["settle"], None),
        (script + ["settle"], 1),
        (script + ["resolve"], 1),
        (script + ["settle"], 2),
    ], cache)


def test_run_first_then_replay_audit_and_one_thread(log: Path, tmp_path: Path) -> None:
    cache = tmp_path / "cache"
    src = f"file:{log}"
    _run_in_order([
        (_cli("run", "--source", src, "--out", str(tmp_path / "B"), "--stop-at-end"), 1),
        (_cli("audit", str(tmp_path / "B")), None),
        (_cli("replay", str(log), "--out", str(tmp_path / "A")), 2),
        (_cli("run", "--source", src, "--out", str(tmp_path / "C"), "--stop-at-end"), None),
        (_cli("audit", str(tmp_path / "C")), 1),
    ], cache)
