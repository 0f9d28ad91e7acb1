"""``ranktide bench``: the engine against recomputing, measured side by side in one run.

What is measured (every figure comes from the run that prints it):

* a generated power-law digraph (Chung–Lu, Pareto out- and in-weights,
  duplicates removed; see :mod:`replay.graphs`) is bulk-loaded and solved
  to a certified 1e-9;
* update batches of ``B`` mixed events (80 % inserts of new edges, 20 %
  deletes of present ones, shuffled) are handled by every contender to the
  same certified normalised L1 accuracy 1e-6:

  - ranktide: ``Engine.apply`` + ``Engine.settle``;
  - SciPy power iteration warm-started from the exact solution before the
    batch (``solver.exact.solve(..., x0=previous)``), timed without building
    the transposed transition matrix (that build is timed and shown apart);
  - the same power iteration started cold;
  - NetworkX ``pagerank`` (tiny and small graphs only);
  - python-igraph's PRPACK (``Graph.pagerank(implementation="prpack")``),
    with the igraph graph built outside the timed region;

  each result is compared with an exact solve (certified 1e-11, warm from the
  previous exact solution) and ranktide's certified bound is shown;
* the per-node contract (:mod:`bench_per_node`): every contender promising
  each score within relative 1e-3, the certified warm start beside its
  oracle-stopped best case, single-event latency and the backlog rate;
* personalization profiles seeded by seed events, engine throughput at the
  service's micro-batch, snapshot write and load, the replay floor (reading
  and parsing a log against replaying it, and ``ranktide replay`` in a fresh
  process against the orjson parse floor), and the service end to end on a
  local Kafka broker when :mod:`stream.broker` is present.

The parts, one file each: :mod:`bench_common` (sizes, targets, helpers,
machine), :mod:`bench_workloads` (generated graph, bulk load, update
batches), :mod:`bench_contenders` (SciPy, NetworkX, igraph),
:mod:`bench_engine` (update batches, throughput, profiles, snapshots, real
graph), :mod:`bench_end_to_end` (replay floor, service on a local broker),
:mod:`bench_replay` (the replay command against the orjson floor) and
:mod:`bench_report` (tables, plot); the options are in :mod:`bench_options`
(imported alone by the command line's parser). This module holds
:func:`run_bench`, the entry point of the command.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
from pathlib import Path

import numpy as np

from ranktide.replay.bench_contenders import INSTALL_EXTRAS, LABELS, missing_contenders
from ranktide.replay.bench_options import add_bench_options  # noqa: F401 - the command's options live there
from ranktide.replay.bench_common import (
    BACKLOG_BATCHES, DAMPING, E2E_EVENTS, HEADLINE_BATCH, INSERT_SHARE, REFERENCE_TOL, SIZES,
    THROUGHPUT_BATCHES, TOLERANCE, _finite_or_none, _peak_rss_bytes, _say, machine_info,
)
from ranktide.replay.bench_end_to_end import measure_e2e, measure_replay
from ranktide.replay.bench_per_node import measure_per_node
from ranktide.replay.bench_replay import measure_replay_cli
from ranktide.replay.bench_engine import (
    _copy_tracker, contenders_for, measure_backlog, measure_profiles, measure_real_graph,
    measure_snapshot, measure_throughput, reserve_for, run_batches, scaling_run, start_tracker,
)
from ranktide.replay.bench_report import render, write_plot
from ranktide.replay.bench_workloads import EdgeSet, generated, load_graph, warm_up_kernels


# ====================================================================== the whole bench


def headline(rows: list[dict]) -> dict:
    """The row of the 1,000-event batches, or the measured size closest to it."""
    return min(rows, key=lambda r: (abs(math.log(r["batch"] / HEADLINE_BATCH)), r["batch"]))


def run_all(args: argparse.Namespace, folder: Path) -> dict:
    """Every measurement of one run, as one report."""
    from ranktide.stream.config import ServiceConfig

    report: dict = {"machine": machine_info(), "settings": {
        "size": args.size, "batches": args.batches, "repeats": args.repeats, "seed": args.seed,
        "profiles": args.profiles, "damping": DAMPING, "tolerance": TOLERANCE, "reference_tolerance": REFERENCE_TOL,
        "networkx_tol": "(1 - damping) * 1e-6 / N", "insert_share": INSERT_SHARE}}
    missing = missing_contenders()
    report["missing_contenders"] = {name: f"{module} is not installed: {INSTALL_EXTRAS}"
                                    for name, module in missing.items()}
    for name, module in missing.items():
        _say(f"skipping {LABELS[name]}: {module} is not installed (install the bench extras: {INSTALL_EXTRAS})")
    _say("compiling kernels on a small graph")
    report["settings"]["kernel_warm_up_seconds"] = warm_up_kernels()
    _say(f"generating the {args.size} graph")
    src0, dst0, sampler, ginfo = generated(args.size, args.seed)
    report["graph"] = ginfo
    _say("bulk load and first solve")
    loaded = load_graph(SIZES[args.size][0], src0, dst0, np.ones(src0.size), sampler)
    report["load"] = loaded.info
    report["load"]["reserved_edge_room"] = reserve_for(loaded, args.batches, args.repeats)
    tr = start_tracker(loaded, args.seed)
    report["batches"] = run_batches(tr, args.batches, args.repeats, contenders_for(args.size, missing), ["global"],
                                    f"update batches ({args.size})")
    micro, settle_interval = ServiceConfig().micro_batch, ServiceConfig().settle_interval
    outside = [c for c in contenders_for(args.size, missing) if c in ("igraph_prpack", "networkx")]
    report["per_node"] = measure_per_node(loaded, args.batches, args.repeats, args.seed, outside,
                                          micro, BACKLOG_BATCHES[args.size], settle_interval)
    report["scaling"] = {args.size: _scaling_rows(report["batches"])}
    if args.size == "large":
        for other in ("small", "medium"):
            report["scaling"][other] = _scaling_rows(scaling_run(other, args.batches, args.repeats, args.seed))
    _say(f"engine throughput at micro-batches of {micro:,}")
    report["throughput"] = measure_throughput(tr, micro, THROUGHPUT_BATCHES[args.size])
    _say("snapshot write and load")
    report["snapshot"], snap_path = measure_snapshot(tr.engine, folder / "snapshots")
    snap_edges = tr.loaded.edges.copy()
    _say("engine throughput on the service's backlog schedule")
    report["backlog"] = measure_backlog(_copy_tracker(tr, args.seed + 11), micro, BACKLOG_BATCHES[args.size],
                                        ServiceConfig().settle_interval)
    if args.profiles > 0:
        size = headline(report["batches"])["batch"]
        report["personalized"] = measure_profiles(tr, args.profiles, size, args.repeats)
    report["peak_rss_bytes"] = _peak_rss_bytes()
    del tr, loaded
    report["replay"] = measure_replay(src0, dst0, folder)
    report["replay"]["command"] = measure_replay_cli(src0, dst0, SIZES[args.size][0], sampler, folder,
                                                     args.seed + 13, args.repeats)
    _say("bundled real graph")
    report["real_graph"] = measure_real_graph(args.repeats, args.seed, missing)
    if args.skip_e2e:
        report["end_to_end"] = {"skipped": "--skip-e2e"}
    else:
        report["end_to_end"] = measure_e2e(snap_edges, sampler, E2E_EVENTS[args.size], snap_path, folder,
                                           np.random.default_rng(args.seed + 7))
    _add_headlines(report)
    return report


def _scaling_rows(rows: list[dict]) -> list[dict]:
    return [{"batch": r["batch"], "ranktide_seconds_per_event": r["ranktide"]["seconds_per_event"],
             "warm_start_seconds_per_event": r["warm_start"]["seconds_per_event"]} for r in rows]


def _add_headlines(report: dict) -> None:
    head = headline(report["batches"])
    report["speedup_vs_warm_start"] = head["speedup"]["warm_start"]
    report["speedup_vs_warm_start_batch"] = head["batch"]
    report["speedup_vs_warm_start_graph"] = report["graph"]["size"]
    report["speedup_vs_warm_start_own"] = head["speedup"].get("warm_start_own")
    report["events_per_second"] = report["throughput"]["apply_and_settle_events_per_second"]
    report["events_per_second_apply_only"] = report["throughput"]["apply_only_events_per_second"]
    report["events_per_second_backlog_schedule"] = report["backlog"]["events_per_second"]
    e2e = report["end_to_end"]
    report["end_to_end_events_per_second"] = e2e["json"]["events_per_second"] if "json" in e2e else None
    report["end_to_end_arrow_events_per_second"] = e2e["arrow"]["events_per_second"] if "arrow" in e2e else None


def run_bench(args: argparse.Namespace) -> int:
    """Entry point of ``ranktide bench``; prints tables or one JSON object."""
    with tempfile.TemporaryDirectory(prefix="ranktide-bench-") as tmp:
        report = run_all(args, Path(tmp))
    if args.plot:
        write_plot(report, args.plot)
        report["plot"] = str(args.plot.resolve())
    if args.json:
        print(json.dumps(_finite_or_none(report), indent=1, allow_nan=False))
    else:
        print(render(report))
    if args.plot:
        print(f"plot written to {args.plot.resolve()}", file=sys.stderr if args.json else sys.stdout)
    return 0
