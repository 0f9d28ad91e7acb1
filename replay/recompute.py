"""``ranktide recompute``: a full recompute of every profile, written as a ranktide snapshot.

The input is a ranktide snapshot (its edges, seeds and node list) or an edge
table (a Parquet file or a folder of part files with columns ``src``, ``dst``
and optionally ``weight``), optionally with a node table (column ``node``) for
nodes without edges. Every profile (global, and the personalizations of the
snapshot or of ``--personalization``) is solved in the engine's form
``x = a s + d P^T x`` and stopped on a bound certified by the iterate itself
(``solver.recompute``). The output is a complete snapshot (``source:
"recompute"`` in the manifest) from which ``ranktide run`` and ``replay
--from`` start: a team bootstraps a live service from its table.

``--engine local`` (the default) iterates with SciPy in memory;
``--engine spark`` runs the same iteration on Apache Spark DataFrames
(``replay.spark_recompute``).
"""

from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from ranktide.solver import GLOBAL, Ranker
from ranktide.solver.engine import MAX_WEIGHT, MIN_WEIGHT
from ranktide.solver.exact import transition_transpose
from ranktide.solver.ids import NodeIds
from ranktide.replay.recompute_common import (RecomputeError, RecomputeInput, Settings, number_text, print_progress,
                                              recompute_manifest, write)
from ranktide.solver.recompute import Targets, recompute
from ranktide.stream.rootlock import LOCK_NAME, RootLock
from ranktide.stream.snapshots import (Counters, OutputError, SnapshotError, contract_facts, parquet_filler,
                                       read_manifest, snapshot_dirs, snapshot_tables, verify)



def snapshot_folder(path: Path) -> Path | None:
    """``path`` itself when it is a snapshot folder, the newest snapshot when it is a root, else None."""
    if (path / "manifest.json").is_file():
        return path
    dirs = snapshot_dirs(path)
    return dirs[-1] if dirs else None


def resolve_input(text: str, node_table: str | None = None, check: bool = True) -> RecomputeInput:
    """Interpret INPUT: a local snapshot folder or root, else an edge table path or URI."""
    path = Path(text)
    folder = snapshot_folder(path) if "://" not in text and path.is_dir() else None
    if folder is None:
        if "://" not in text and not path.exists():
            raise RecomputeError(f"{text}: no such file or folder")
        return RecomputeInput(edges=text, nodes=node_table)
    try:
        manifest = read_manifest(folder)
        if check:
            verify(folder, manifest)
        seeds_table = pq.read_table(folder / "seeds.parquet")
    except (SnapshotError, OSError, pa.ArrowException) as exc:
        raise RecomputeError(f"{folder}: {exc}") from exc
    seeds = {}
    for name in manifest.get("profiles", {}):
        if name == GLOBAL:
            continue
        part = seeds_table.filter(pc.equal(seeds_table["profile"], name))
        seeds[name] = (part["node"].to_pylist(), part["weight"].to_pylist())
    return RecomputeInput(edges=str(folder / "edges.parquet"), nodes=str(folder / "scores.parquet"),
                          seeds=seeds, manifest=manifest)


def settings_for(inp: RecomputeInput, rtol: float | None, tolerance: float | None, certified_top: int | None,
                 damping: float | None, positions: dict | None) -> Settings:
    """Targets and facts: options first, then the input snapshot's, then the defaults (rtol 1e-3)."""
    m = inp.manifest or {}
    if rtol is None and tolerance is None and inp.from_snapshot:
        rtol, tolerance = m.get("rtol"), m.get("tolerance")
    elif rtol is None:
        rtol = 1e-3 if tolerance is None else None
    rtol = rtol or None
    tolerance = tolerance or None
    if rtol is None and tolerance is None:
        raise RecomputeError("--rtol 0 needs --tolerance: a recompute needs a target")
    top = certified_top or m.get("certified_top") or 100
    counters = Counters(m.get("events_applied", 0), m.get("events_noop", 0), m.get("events_rejected", 0))
    return Settings(Targets(rtol, tolerance, int(top)), float(damping or m.get("damping") or 0.85),
                    positions if positions is not None else dict(m.get("positions", {})), counters)


# ------------------------------------------------------------------ the local engine


def _read_table(where: str, columns: list[str], what: str) -> pa.Table:
    """A Parquet file or folder of part files (files starting with ``_`` or ``.`` are skipped)."""
    try:
        dataset = ds.dataset(where, format="parquet")
        missing = [c for c in columns if c not in dataset.schema.names]
        if missing:
            raise RecomputeError(f"{where}: the {what} has no column {missing[0]!r} "
                                 f"(columns: {', '.join(dataset.schema.names)})")
        return dataset.to_table(columns=[c for c in columns + ["weight", "profile"] if c in dataset.schema.names])
    except (OSError, pa.ArrowException) as exc:
        raise RecomputeError(f"{where}: cannot read the {what}: {exc}") from exc


def _strings(column: pa.ChunkedArray, where: str, name: str) -> pa.Array:
    column = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if column.null_count:
        raise RecomputeError(f"{where}: column {name} holds {column.null_count} null node ids")
    return column if pa.types.is_string(column.type) else column.cast(pa.string())


def check_weights(weight: np.ndarray, where: str) -> None:
    """Every edge weight finite and within the engine's range, else a RecomputeError naming the row."""
    with np.errstate(invalid="ignore"):
        bad = ~((weight >= MIN_WEIGHT) & (weight <= MAX_WEIGHT))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise RecomputeError(f"{where}: row {i}: weight {weight[i]!r} outside [{MIN_WEIGHT:g}, {MAX_WEIGHT:g}]")


@dataclass
class LocalGraph:
    """The input graph on dense ids."""

    ids: NodeIds
    src: np.ndarray
    dst: np.ndarray
    weight: np.ndarray
    teleports: dict[str, np.ndarray]


def load_local(inp: RecomputeInput) -> LocalGraph:
    """Read the input into memory: ids, edges (weight 1 when the column is absent), teleports."""
    edges = _read_table(inp.edges, ["src", "dst"], "edge table")
    ids = NodeIds()
    if inp.nodes is not None:
        nodes = _read_table(inp.nodes, ["node"], "node table")
        if "profile" in nodes.column_names:  # a snapshot's scores: the global rows list every node
            nodes = nodes.filter(pc.equal(nodes["profile"], GLOBAL))
        ids.intern(_strings(nodes["node"], inp.nodes, "node"))
    src = ids.intern(_strings(edges["src"], inp.edges, "src"))
    dst = ids.intern(_strings(edges["dst"], inp.edges, "dst"))
    if "weight" in edges.column_names:
        if edges["weight"].null_count:
            raise RecomputeError(f"{inp.edges}: column weight holds null weights")
        weight = edges["weight"].to_numpy().astype(np.float64)
        check_weights(weight, inp.edges)
    else:
        weight = np.ones(src.size)
    seed_ids = {name: ids.intern(pa.array(nodes_, pa.string())) for name, (nodes_, _) in inp.seeds.items()}
    n = len(ids)
    keys = src.astype(np.int64) * np.int64(max(n, 1)) + dst
    unique, counts = np.unique(keys, return_counts=True)
    if unique.size != keys.size:
        twice = int(unique[np.argmax(counts > 1)])
        raise RecomputeError(f"{inp.edges}: {keys.size - unique.size} (src, dst) pairs are listed more than once, "
                             f"e.g. {ids.name(twice // n)} -> {ids.name(twice % n)}")
    teleports = {GLOBAL: np.ones(n)}
    for name, (_, weights) in inp.seeds.items():
        s = np.zeros(n)
        np.add.at(s, seed_ids[name], np.asarray(weights, dtype=np.float64))
        teleports[name] = s
    return LocalGraph(ids, src, dst, weight, teleports)


def recompute_local(inp: RecomputeInput, out: Path, settings: Settings, progress: bool = True,
                    max_iter: int = 10_000) -> Path:
    """Recompute in memory with SciPy and write the snapshot; returns its folder."""
    started = time.perf_counter()
    g = load_local(inp)
    n = len(g.ids)
    PT = transition_transpose(g.src, g.dst, g.weight, n)
    last = [time.perf_counter()]

    def report(it: int, figures: dict) -> None:
        now = time.perf_counter()
        if progress:
            print_progress(it, figures, now - last[0])
        last[0] = now

    result = recompute(PT, g.teleports, settings.damping, settings.targets, max_iter=max_iter, progress=report)
    if not result.met:
        raise RecomputeError(f"{inp.edges}: no certified result after {max_iter} iterations", code=1)
    t = settings.targets
    ranker = Ranker(damping=settings.damping, rtol=t.rtol, tolerance=t.tolerance, certified_top=t.certified_top)
    ranker.ids = g.ids
    estimates = {name: it.x for name, it in result.profiles.items()}
    ranker.engine.restore(n, (g.src, g.dst, g.weight), estimates, g.teleports)
    certificates = {name: it.certificate for name, it in result.profiles.items()}
    tables = snapshot_tables(ranker, certificates)
    facts = {name: {"estimate_sum": float(it.x.sum()), **contract_facts(it.certificate, name == GLOBAL)}
             for name, it in result.profiles.items()}
    manifest = recompute_manifest(settings, "local", result.iterations, n, len(g.src), facts, inp,
                                  time.perf_counter() - started)
    return write(out, parquet_filler(tables), manifest)


# ------------------------------------------------------------------ command line


def parse_positions(text: str | None) -> dict | None:
    """``--positions``: a JSON object, or a file holding one."""
    if text is None:
        return None
    try:
        raw = text if text.lstrip().startswith("{") else Path(text).read_text(encoding="utf-8")
        value = json.loads(raw)
    except OSError as exc:
        raise RecomputeError(f"--positions {text}: cannot read: {exc.strerror or exc}") from exc
    except json.JSONDecodeError as exc:
        raise RecomputeError(f"--positions: not valid JSON: {exc}") from exc
    if not isinstance(value, dict):
        raise RecomputeError("--positions: expected a JSON object such as "
                             '{"files": {"/path/events.jsonl": {"offset": 1234, "line": 10}}}')
    return value


def parse_spark_conf(items: list[str] | None) -> dict[str, str]:
    """``--spark-conf KEY=VALUE`` options as a dict."""
    conf = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise RecomputeError(f"--spark-conf {item!r}: expected KEY=VALUE")
        conf[key.strip()] = value
    return conf


def add_seeds(inp: RecomputeInput, personalizations: list[tuple[str, Path]] | None) -> None:
    """Add (or replace) personalizations from seeds files."""
    from ranktide.stream.logs import LogError, read_seeds_file

    for name, path in personalizations or []:
        try:
            inp.seeds[name] = read_seeds_file(path)
        except LogError as exc:
            raise RecomputeError(str(exc)) from exc


def run_engine(inp: RecomputeInput, out: Path, settings: Settings, engine: str, master: str | None,
               spark_conf: dict[str, str], staging: str | None = None, progress: bool = True) -> Path:
    """Recompute with ``engine`` into ``out``; returns the snapshot folder."""
    if engine == "spark":
        from ranktide.replay.spark_recompute import recompute_spark, spark_session

        with spark_session(master, spark_conf) as spark:
            try:
                return recompute_spark(spark, inp, out, settings, staging=staging, progress=progress)
            except Exception as exc:  # a failed Spark job (lost executors, memory): one line, not a JVM trace
                if not type(exc).__module__.startswith(("py4j", "pyspark")):
                    raise
                first = next((line for line in str(exc).splitlines() if line.strip()), type(exc).__name__)
                raise RecomputeError(f"the Spark job failed: {first[:500]}") from None
    return recompute_local(inp, out, settings, progress=progress)


def run_recompute(args) -> int:
    """``ranktide recompute``; returns the exit code."""
    try:
        inp = resolve_input(args.input, args.nodes)
        add_seeds(inp, args.personalization)
        settings = settings_for(inp, args.rtol, args.tolerance, args.certified_top, args.damping,
                                parse_positions(args.positions))
        # one writer per root, like run and replay; taken once the input is known to be good
        out = Path(args.out)
        fresh_root = not out.exists()
        lock = RootLock.acquire(out, "ranktide recompute", input=str(args.input))
        try:
            path = run_engine(inp, out, settings, args.engine, args.master,
                              parse_spark_conf(args.spark_conf), args.staging, progress=not args.quiet)
        except BaseException:
            if fresh_root:  # a failed first write leaves no root behind, not even the lock file
                (out / LOCK_NAME).unlink(missing_ok=True)
                if not any(out.iterdir()):
                    out.rmdir()
            raise
        finally:
            lock.release()
    except RecomputeError as exc:
        print(f"ranktide recompute: error: {exc}", file=sys.stderr)
        return exc.code
    except SnapshotError as exc:  # the root is another writer's, or cannot be locked
        print(f"ranktide recompute: error: {exc}", file=sys.stderr)
        return 3 if isinstance(exc, OutputError) else 2
    manifest = read_manifest(path)
    if not args.quiet:
        print(f"recomputed {manifest['nodes']:,} nodes, {manifest['edges']:,} edges on {manifest['engine']} in "
              f"{manifest['iterations']} iterations ({manifest['recompute']['seconds']:.1f} s): {path}")
        for name, facts in manifest["profiles"].items():
            print(f"profile {name}: certified relative error {number_text(facts['rtol_reached'] or math.inf)}, "
                  f"L1 bound {number_text(facts['l1_bound'] or math.inf)}")
    return 0
