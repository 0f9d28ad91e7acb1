"""``ranktide replay`` as a user runs it, against the orjson parse floor (part of ``ranktide bench``).

The log: the generated graph's edges as insert events (1,000,000 of them at
the medium size), then a tenth as many mixed events drawn like
:func:`bench_workloads.mixed_batch` draws them: 60 % inserts of new edges,
20 % deletes of present edges, 20 % re-weights of present edges (an insert
with a new weight), shuffled. The floor is reading that file and decoding
every line with ``orjson.loads`` in this process; the replay is
``python -m ranktide.stream.cli replay LOG --out ROOT`` in a fresh child
process whose kernels are already in numba's cache, timed wall to wall,
start-up included.

Where the replay's time goes is measured cheaply: the child's own timing
line (``--log-level DEBUG``: read+parse, apply, snapshot), the wall time of
a child that only imports the replay path, and that of a replay of a
ten-line log (start-up plus loading every kernel the replay calls, little
work). Interning ids is timed apart in this process.
"""

from __future__ import annotations

import re
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from ranktide.replay.bench_common import _say
from ranktide.replay.bench_contenders import INSTALL_EXTRAS
from ranktide.replay.bench_workloads import EdgeSet, new_edges
from ranktide.replay.graphs import PowerLawSampler

#: Target of issue 11: the replay within this many times the orjson floor, start-up included.
TARGET_RATIO = 3.0
#: Inserts in the log at most (the medium graph gives exactly this many).
MAX_INSERTS = 1_000_000
#: Shares of the mixed events: inserts of new edges, deletes, re-weights.
MIXED_SHARES = (0.6, 0.2, 0.2)
_TIMING = re.compile(r"replay timing: read\+parse ([\d.]+) s .*waited for ([\d.]+) s\), apply ([\d.]+) s .*"
                     r"snapshot ([\d.]+) s, total ([\d.]+) s")


def event_lines(op: np.ndarray, src: np.ndarray, dst: np.ndarray, weight: np.ndarray | None):
    """JSON lines, each ending in a newline, as one Arrow string array (Arrow string kernels, no Python loop).

    ``op`` holds the op names; ``weight`` (optional) gives each line a weight field.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    parts = ['{"op":"', pa.array(op, pa.string()), '","src":"', pc.cast(pa.array(src), pa.string()),
             '","dst":"', pc.cast(pa.array(dst), pa.string()), '"']
    if weight is not None:
        parts += [',"weight":', pc.cast(pa.array(weight), pa.string())]
    return pc.binary_join_element_wise(*parts, "}\n", "")


def mixed_events(edges: EdgeSet, count: int, sampler: PowerLawSampler,
                 rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Keys, op names and weights of ``count`` shuffled mixed events against the present ``edges``."""
    n_ins = int(round(MIXED_SHARES[0] * count))
    n_del = int(round(MIXED_SHARES[1] * count))
    n_rew = count - n_ins - n_del
    inserted = new_edges(n_ins, edges, sampler, rng)
    present = edges.sample(n_del + n_rew, rng)
    keys = np.concatenate([inserted, present])
    ops = np.array(["insert"] * n_ins + ["delete"] * n_del + ["insert"] * n_rew, dtype=object)
    weights = np.concatenate([np.ones(n_ins + n_del), np.round(rng.uniform(0.5, 4.0, n_rew), 3)])
    order = rng.permutation(count)
    return keys[order], ops[order], weights[order]


def _file_bytes(lines) -> memoryview:
    """The characters of a string array back to back (each line carries its newline)."""
    import pyarrow as pa

    lines = lines.cast(pa.large_string())
    offsets = np.frombuffer(lines.buffers()[1], np.int64, len(lines) + 1, lines.offset * 8)
    return memoryview(lines.buffers()[2])[int(offsets[0]):int(offsets[-1])]


def write_mixed_log(src: np.ndarray, dst: np.ndarray, n: int, sampler: PowerLawSampler, path: Path,
                    seed: int) -> dict:
    """Write the replay log (inserts, then mixed events) to ``path``; return its make-up."""
    import pyarrow as pa
    import pyarrow.compute as pc

    rng = np.random.default_rng(seed)
    count = min(MAX_INSERTS, src.size // 2)
    pick = rng.choice(src.size, size=count, replace=False)  # shuffled: a log is in arrival order
    s, d = src[pick], dst[pick]
    keys, ops, weights = mixed_events(EdgeSet(s, d, n), count // 10, sampler, rng)
    inserts = event_lines(np.full(count, "insert", dtype=object), s, d, None)
    ms, md = keys // n, keys % n
    # deletes carry no weight field
    mixed = pc.if_else(pa.array(ops == "delete"), event_lines(ops, ms, md, None), event_lines(ops, ms, md, weights))
    with open(path, "wb") as fh:
        fh.write(_file_bytes(inserts))
        fh.write(_file_bytes(mixed))
    return {"inserts": count, "mixed": int(keys.size), "events": count + int(keys.size),
            "file_bytes": path.stat().st_size}


def orjson_floor(path: Path) -> float | None:
    """Seconds to read ``path`` and decode every line with ``orjson.loads``, or None without orjson."""
    try:
        import orjson
    except ImportError:
        return None
    started = time.perf_counter()
    with open(path, "rb") as fh:
        for line in fh:
            orjson.loads(line)
    return time.perf_counter() - started


def _child(args: list[str]) -> tuple[float, subprocess.CompletedProcess]:
    """Wall seconds of ``python ARGS`` in a fresh process, start-up included, and its outcome."""
    started = time.perf_counter()
    done = subprocess.run([sys.executable, *args], capture_output=True, text=True, timeout=900)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        raise RuntimeError(f"python {' '.join(args)} failed ({done.returncode}): {done.stderr.strip()[-500:]}")
    return seconds, done


def replay_child(log: Path, out: Path) -> tuple[float, dict]:
    """Wall seconds of ``ranktide replay LOG --out ROOT`` in a fresh process, and its timing line."""
    seconds, done = _child(["-m", "ranktide.stream.cli", "--log-level", "DEBUG", "replay", str(log),
                            "--out", str(out)])
    found = _TIMING.search(done.stderr)
    phases = {} if found is None else dict(zip(("read_parse", "waiting_for_parse", "apply", "snapshot", "replay_log"),
                                               map(float, found.groups())))
    applied = re.search(r"events applied ([\d,]+)", done.stdout)
    phases["events_applied"] = int(applied.group(1).replace(",", "")) if applied else None
    return seconds, phases


def interning_seconds(log: Path) -> float:
    """Seconds to intern every src and dst id of the log with a fresh id map (ids of the replay, in-process)."""
    from ranktide.solver.ids import NodeIds
    from ranktide.stream.logs import read_log

    batches = [chunk.parsed.batch for chunk in read_log(log)]
    ids = NodeIds()
    NodeIds().intern(batches[0].src.slice(0, 8))  # kernel loaded before timing
    started = time.perf_counter()
    for batch in batches:
        ids.intern(batch.src)
        ids.intern(batch.dst)
    return time.perf_counter() - started


def measure_replay_cli(src: np.ndarray, dst: np.ndarray, n: int, sampler: PowerLawSampler, folder: Path,
                       seed: int, repeats: int = 3) -> dict:
    """The 1.1M-event replay in a fresh process against the orjson floor, with its breakdown.

    The floor and the replay are each measured ``repeats`` times, alternately;
    the medians are reported, with the phases of the median replay.
    """
    log = folder / "mixed.jsonl"
    _say("replay command: writing the inserts-then-mixed log")
    out: dict = write_mixed_log(src, dst, n, sampler, log, seed)
    tiny = folder / "ten.jsonl"
    with open(log, "rb") as fh, open(tiny, "wb") as small:
        small.writelines(fh.readline() for _ in range(10))
    _say("replay command: warm-up run (kernels into the cache)")
    _child(["-m", "ranktide.stream.cli", "replay", str(tiny), "--out", str(folder / "replay-warm"), "--quiet"])
    floors, runs = [], []
    for k in range(repeats):
        _say(f"replay command: ranktide replay of {out['events']:,} events in a fresh process ({k + 1}/{repeats})")
        floors.append(orjson_floor(log))
        runs.append(replay_child(log, folder / f"replay-cli-{k}"))
    floor = None if floors[0] is None else float(np.median(floors))
    if floor is None:
        _say(f"replay command: orjson is not installed, so the floor is not measured ({INSTALL_EXTRAS})")
    seconds, phases = sorted(runs, key=lambda r: r[0])[len(runs) // 2]
    out.update({
        "orjson_floor_seconds": floor, "replay_seconds": seconds, "target_ratio": TARGET_RATIO,
        "ratio": seconds / floor if floor else None, "repeats": repeats,
        "meets_target": bool(floor) and seconds / floor <= TARGET_RATIO,
        "command": "python -m ranktide.stream.cli replay LOG --out ROOT",
        "events_applied": phases.pop("events_applied"),
        "breakdown": {**_fixed_costs(tiny, folder),
                      "start_up_seconds": seconds - phases["replay_log"] if "replay_log" in phases else None,
                      **{f"{k}_seconds": v for k, v in phases.items()},
                      "interning_seconds_in_process": interning_seconds(log)},
    })
    return out


def _fixed_costs(tiny: Path, folder: Path) -> dict:
    """Interpreter start, imports of the replay path, and kernel loading (a ten-line replay less the imports)."""
    bare, _ = _child(["-c", "pass"])
    imports, _ = _child(["-c", "import ranktide.stream.cli, ranktide.replay.replay"])
    ten, _ = replay_child(tiny, folder / "replay-ten")
    return {"interpreter_seconds": bare, "imports_seconds": imports - bare,
            "kernel_loading_seconds": max(ten - imports, 0.0)}


def main(argv: list[str] | None = None) -> int:
    """``python -m ranktide.replay.bench_replay``: this measurement alone."""
    import argparse
    import json
    import tempfile

    from ranktide.replay.bench_common import machine_info
    from ranktide.replay.bench_options import SIZES
    from ranktide.replay.bench_report import _replay_command_lines
    from ranktide.replay.graphs import power_law_digraph

    p = argparse.ArgumentParser(prog="python -m ranktide.replay.bench_replay",
                                description="ranktide replay of an inserts-then-mixed JSON Lines log in a fresh "
                                            "process against the orjson parse floor (as in ranktide bench).")
    p.add_argument("--size", choices=list(SIZES), default="medium", help="generated graph (default medium)")
    p.add_argument("--repeats", type=int, default=3, help="runs of the floor and of the replay (default 3)")
    p.add_argument("--seed", type=int, default=0, help="seed of the graph and events (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    args = p.parse_args(argv)
    n, m = SIZES[args.size]
    src, dst, sampler = power_law_digraph(n, m, args.seed)
    with tempfile.TemporaryDirectory(prefix="ranktide-bench-replay-") as tmp:
        report = {"machine": machine_info(), "size": args.size,
                  "command": measure_replay_cli(src, dst, n, sampler, Path(tmp), args.seed + 13, max(args.repeats, 1))}
    print(json.dumps(report, indent=1) if args.json else "\n".join(_replay_command_lines(report["command"])[1:]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
